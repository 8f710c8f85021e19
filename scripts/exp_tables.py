"""Prints the tables of guest-sdk/src/exp.rs: 2^(i/N) rounded to double,
with i << (52 - log2 N) subtracted from its bits, and for N = 128 the
relative rounding error of each entry before it. mpmath at 200 bits."""
import struct

import mpmath

mpmath.mp.prec = 200


def bits(d):
    return struct.unpack("<Q", struct.pack("<d", d))[0]


def table(name, xs):
    print(f"const {name}: [u64; {len(xs)}] = [")
    for k in range(0, len(xs), 4):
        print("    " + " ".join("0x%016x," % x for x in xs[k : k + 4]))
    print("];")


single = []
for i in range(32):
    single.append((bits(float(mpmath.mpf(2) ** (mpmath.mpf(i) / 32))) - (i << 47)) % 2**64)
double = []
for i in range(128):
    exact = mpmath.mpf(2) ** (mpmath.mpf(i) / 128)
    d = float(exact)
    double += [bits(float(exact / mpmath.mpf(d) - 1)), (bits(d) - (i << 45)) % 2**64]
table("TAB32", single)
table("TAB128", double)
