#!/usr/bin/env python3
"""Load and soak figures for `paddock serve`, measured with wrk on loopback.

    python3 scripts/http_load.py load [SECONDS]     single-row and 64-row requests (default 15 s each)
    python3 scripts/http_load.py soak [REQUESTS]    REQUESTS (default 1 000 000) with 100 swaps under way
    python3 scripts/http_load.py isolation [SECONDS] a healthy model's latency alone and while another spins
    python3 scripts/http_load.py unknown [REQUESTS]  RSS across REQUESTS (default 100 000) naming unknown models
    python3 scripts/http_load.py lookups [SECONDS]  requests/s with features carried, from a table, from Redis
    python3 scripts/http_load.py capture [SECONDS]  p99 with capture off, at 1 % and at 100 %, rounds interleaved

Needs `cargo xtask build` first (the demo store) and wrk (Debian package
`wrk`; installed with apt-get when missing). Builds the release binary,
serves a copy of the demo store's `overstay-risk` versions (logistic
regression, 6 features) on a free loopback port, and drives it.

`load` writes its section of BENCHMARKS.md: requests/s, rows/s, p50/p99
latency for 1-row and 64-row requests, with the machine noted. wrk and the
server share the machine's cores, as a sidecar and its caller would.

`soak` sends at least REQUESTS requests while the store changes 100 times
(routes flipping the default between two versions, an extra version added
and removed) through the file watcher, samples the server's RSS every
second, and fails unless no request failed (wrk's non-2xx count and socket
errors are both zero), every swap was taken (the generation rose by at
least 100), and RSS after warm-up stays within 10 % of its first post-warm-up
sample. It writes its section of BENCHMARKS.md.
"""
import json
import os
import platform
import re
import shutil
import subprocess
import sys
import tempfile
import threading
import time
import urllib.error
import urllib.request

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DEMO = os.path.join(ROOT, "target", "paddock", "store")
sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_table import cpu  # noqa: E402

ROW = {"expected_minutes": 95.0, "plugin_hour": 18, "member_overstay_rate": 0.2, "site_occupancy": 0.7,
       "weekend": False, "fleet": False}
ROUTES = '[models.overstay-risk]\ndefault = "{v}"\n'


def ensure_wrk():
    if shutil.which("wrk"):
        return
    print("installing wrk (apt-get)", file=sys.stderr)
    subprocess.run(["apt-get", "install", "-y", "wrk"], check=False, stdout=subprocess.DEVNULL)
    if not shutil.which("wrk"):
        subprocess.run(["apt-get", "update"], check=True, stdout=subprocess.DEVNULL)
        subprocess.run(["apt-get", "install", "-y", "wrk"], check=True, stdout=subprocess.DEVNULL)


def build():
    subprocess.run(["cargo", "build", "--release", "-q", "-p", "paddock-cli", "--bin", "paddock"], cwd=ROOT, check=True)
    return os.path.join(ROOT, "target", "release", "paddock")


def make_store(dir):
    os.makedirs(os.path.join(dir, "overstay-risk"))
    for v in ("1.0.0", "1.1.0"):
        shutil.copy(os.path.join(DEMO, "overstay-risk", f"{v}.wasm"), os.path.join(dir, "overstay-risk", f"{v}.wasm"))
    write(os.path.join(dir, "routes.toml"), ROUTES.format(v="1.0.0"))


def write(path, text):
    tmp = path + ".partial"
    with open(tmp, "w") as f:
        f.write(text)
    os.replace(tmp, path)


class Server:
    def __init__(self, binary, store, extra=()):
        self.proc = subprocess.Popen(
            [binary, "serve", "--store", store, "--listen", "127.0.0.1:0", "--queue", "4096", "--rescan-secs", "5",
             *extra],
            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
        line = self.proc.stdout.readline().strip()
        if not line.startswith("listening on "):
            raise SystemExit(f"the server did not start: {line!r}")
        self.base = line.removeprefix("listening on ")

    def estimate(self, model, fields):
        """The URL and JSON body of a request for estimates from `model`."""
        return f"{self.base}/estimate", json.dumps({"model": model, **fields})

    def store_state(self):
        return self.get("/store")

    def get(self, path):
        return json.load(urllib.request.urlopen(self.base + path))

    def rss_kib(self):
        with open(f"/proc/{self.proc.pid}/status") as f:
            for line in f:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1])
        return 0

    def stop(self):
        self.proc.terminate()
        self.proc.wait(timeout=30)


def wrk(server, rows, seconds, connections=64, threads=2, fields=None):
    fields = fields or {"rows": [ROW] * rows, "context": {"region": "centre"}}
    url, body = server.estimate("overstay-risk", fields)
    lua = tempfile.NamedTemporaryFile("w", suffix=".lua", delete=False)
    lua.write('wrk.method = "POST"\nwrk.headers["Content-Type"] = "application/json"\n')
    lua.write(f"wrk.body = {json.dumps(body)}\n")
    lua.close()
    out = subprocess.run(
        ["wrk", "-t", str(threads), "-c", str(connections), "-d", f"{seconds}s", "--latency", "-s", lua.name, url],
        capture_output=True, text=True, check=True).stdout
    os.unlink(lua.name)
    return parse_wrk(out)


def to_ms(text):
    value, unit = re.match(r"([\d.]+)(us|ms|s)", text).groups()
    return float(value) * {"us": 1e-3, "ms": 1.0, "s": 1e3}[unit]


def parse_wrk(out):
    r = {"raw": out}
    r["requests"] = int(re.search(r"(\d+) requests in", out).group(1))
    r["rps"] = float(re.search(r"Requests/sec:\s+([\d.]+)", out).group(1))
    for p in ("50", "99"):
        r[f"p{p}_ms"] = to_ms(re.search(rf"^\s+{p}%\s+(\S+)", out, re.M).group(1))
    m = re.search(r"Non-2xx or 3xx responses: (\d+)", out)
    r["non2xx"] = int(m.group(1)) if m else 0
    m = re.search(r"Socket errors: connect (\d+), read (\d+), write (\d+), timeout (\d+)", out)
    r["socket_errors"] = sum(int(x) for x in m.groups()) if m else 0
    return r


def replace_section(name, lines):
    start, end = f"<!-- {name} -->", f"<!-- /{name} -->"
    path = os.path.join(ROOT, "BENCHMARKS.md")
    text = open(path).read() if os.path.exists(path) else "# Benchmarks\n"
    block = "\n".join([start, *lines, end])
    if start in text:
        before, rest = text.split(start, 1)
        text = before + block + rest.split(end, 1)[1]
    else:
        text = text.rstrip() + "\n\n" + block + "\n"
    with open(path, "w") as f:
        f.write(text)
    print("\n".join(lines))


def machine():
    return f"{cpu()}, {os.cpu_count()} cores, {platform.system()} {platform.release()}"


def load(seconds):
    binary = build()
    with tempfile.TemporaryDirectory() as store:
        make_store(store)
        server = Server(binary, store)
        try:
            wrk(server, 1, 3)  # warm-up
            results = [(rows, wrk(server, rows, seconds)) for rows in (1, 64)]
        finally:
            server.stop()
    table = []
    for rows, r in results:
        if r["non2xx"] or r["socket_errors"]:
            raise SystemExit(f"{rows}-row load: {r['non2xx']} non-2xx, {r['socket_errors']} socket errors\n{r['raw']}")
        table.append(f"| {rows} | {r['rps']:,.0f} | {r['rps'] * rows:,.0f} | {r['p50_ms']:.2f} ms | {r['p99_ms']:.2f} ms | {r['requests']:,} |")
    single = results[0][1]
    replace_section("http-load", [
        "## HTTP: load",
        "",
        f"`python3 scripts/http_load.py load {seconds}`: `paddock serve` (release build) on loopback serving",
        "`overstay-risk` (logistic regression, 6 features) from the demo store; wrk with 2 threads and 64",
        f"connections for {seconds} s per row count, on the same machine (wrk and the server share its cores).",
        f"Machine: {machine()}.",
        "",
        "| rows per request | requests/s | rows/s | p50 latency | p99 latency | requests |",
        "|---|---|---|---|---|---|",
        *table,
        "",
        f"Targets from issue 5: ≥ 20 000 single-row requests/s on 2 cores — {single['rps']:,.0f}, "
        f"{'met' if single['rps'] >= 20000 else 'not met'}; p99 ≤ 5 ms — {single['p99_ms']:.2f} ms, "
        f"{'met' if single['p99_ms'] <= 5 else 'not met'}.",
    ])


def soak(total):
    binary = build()
    with tempfile.TemporaryDirectory() as store:
        make_store(store)
        server = Server(binary, store)
        try:
            rate = wrk(server, 1, 3)["rps"]
            # Long enough for REQUESTS at the measured rate, and for swaps
            # at least 0.6 s apart, so the watcher (which lets changes
            # settle for 0.2 s) sees each one on its own.
            seconds = max(int(total / (rate * 0.9)) + 5, 70)
            start_generation = server.store_state()["generation"]
            rss = []
            done = threading.Event()

            def sample():
                while not done.is_set():
                    rss.append(server.rss_kib())
                    time.sleep(1)

            def swap():
                gap = seconds / 110
                extra = os.path.join(store, "charge-minutes")
                for i in range(100):
                    time.sleep(gap)
                    if i % 2 == 0:
                        write(os.path.join(store, "routes.toml"), ROUTES.format(v="1.1.0" if i % 4 == 0 else "1.0.0"))
                    elif i % 4 == 1:
                        os.makedirs(extra, exist_ok=True)
                        shutil.copy(os.path.join(DEMO, "charge-minutes", "1.0.0.wasm"), os.path.join(extra, "1.0.0.wasm.partial"))
                        os.replace(os.path.join(extra, "1.0.0.wasm.partial"), os.path.join(extra, "1.0.0.wasm"))
                    else:
                        os.remove(os.path.join(extra, "1.0.0.wasm"))

            sampler = threading.Thread(target=sample)
            swapper = threading.Thread(target=swap)
            sampler.start()
            swapper.start()
            r = wrk(server, 1, seconds)
            swapper.join()
            time.sleep(1)
            done.set()
            sampler.join()
            generations = server.store_state()["generation"] - start_generation
        finally:
            server.stop()
    with open(os.path.join(ROOT, "target", "paddock", "soak-rss.txt"), "w") as f:
        f.write("\n".join(str(k) for k in rss) + "\n")
    warm = rss[len(rss) // 5:] or rss
    base, top, low = warm[0], max(warm), min(warm)
    drift = max(top - base, base - low) / base
    failed = r["non2xx"] + r["socket_errors"]
    ok = failed == 0 and r["requests"] >= total and generations >= 100 and drift <= 0.10
    replace_section("http-soak", [
        "## HTTP: soak",
        "",
        f"`python3 scripts/http_load.py soak {total}`: {r['requests']:,} single-row requests over {seconds} s",
        "(wrk, 2 threads, 64 connections) while the store changed 100 times through the file watcher (the",
        "default route flipping between two versions; an extra artifact added and removed).",
        f"Machine: {machine()}.",
        "",
        f"- failed requests: {r['non2xx']} non-2xx, {r['socket_errors']} socket errors",
        f"- store generations taken during the run: {generations}",
        f"- throughput {r['rps']:,.0f} requests/s; p50 {r['p50_ms']:.2f} ms, p99 {r['p99_ms']:.2f} ms",
        f"- RSS sampled every second ({len(rss)} samples): {rss[0] / 1024:.1f} MiB at start, "
        f"{base / 1024:.1f} MiB after warm-up (first fifth dropped), max {top / 1024:.1f} MiB, min {low / 1024:.1f} MiB, "
        f"end {rss[-1] / 1024:.1f} MiB: largest drift from the post-warm-up sample {drift * 100:.1f} % "
        f"({'within' if drift <= 0.10 else 'over'} 10 %)",
        f"- verdict: {'passed' if ok else 'FAILED'}",
    ])
    if not ok:
        raise SystemExit("soak failed")


SPIN_MODE = b"\x01"  # tests/fixtures/affine.wat mode 1: `score` never returns


def make_spin_store(binary, dir):
    """overstay-risk (healthy) and affine (spins until its deadline)."""
    make_store(dir)
    os.makedirs(os.path.join(dir, "affine"))
    params = os.path.join(dir, ".spin.params")
    with open(params, "wb") as f:
        f.write(SPIN_MODE)
    subprocess.run([binary, "pack", os.path.join(ROOT, "tests", "fixtures", "affine.wat"), "--params", params,
                    "--out", os.path.join(dir, "affine", "1.0.0.wasm"), "--no-verify"],
                   check=True, stdout=subprocess.DEVNULL)
    os.remove(params)
    write(os.path.join(dir, "routes.toml"), ROUTES.format(v="1.0.0") + '[models.affine]\ndefault = "1.0.0"\n')


def spinners(server, clients, stop):
    """`clients` threads each calling the spinning model back to back."""
    url, body = server.estimate("affine", {"rows": [{"x": 1.0}]})

    def loop():
        while not stop.is_set():
            req = urllib.request.Request(url, data=body.encode(),
                                         headers={"Content-Type": "application/json"})
            try:
                urllib.request.urlopen(req, timeout=30).read()
            except Exception:  # 500 (deadline) is the expected answer
                pass

    threads = [threading.Thread(target=loop) for _ in range(clients)]
    for t in threads:
        t.start()
    return threads


def isolation(seconds):
    binary = build()
    with tempfile.TemporaryDirectory() as store:
        make_spin_store(binary, store)
        server = Server(binary, store)
        try:
            wrk(server, 1, 2, connections=4)  # warm-up
            alone = wrk(server, 1, seconds, connections=4)
            stop = threading.Event()
            threads = spinners(server, 4, stop)
            time.sleep(1)  # let the spinning calls take every permit
            spun = wrk(server, 1, seconds, connections=4)
            stop.set()
            for t in threads:
                t.join()
        finally:
            server.stop()
    ratio = spun["p50_ms"] / alone["p50_ms"]
    replace_section("http-isolation", [
        "## HTTP: one model spinning, another served",
        "",
        f"`python3 scripts/http_load.py isolation {seconds}`: `paddock serve` (release, default options: 2 async",
        "workers and a per-model concurrency of 2 on this machine) serving `overstay-risk` (healthy) and",
        "`affine` in its spinning mode (`score` never returns; stopped at the default 50 ms deadline). wrk",
        f"drives the healthy model with 4 connections for {seconds} s, first alone (the baseline, same run), then",
        "while 4 clients call the spinning model back to back (its 2 permits always taken, the rest queued).",
        f"Machine: {machine()}.",
        "",
        "| healthy model | p50 | p99 | requests/s |",
        "|---|---|---|---|",
        f"| alone | {alone['p50_ms']:.2f} ms | {alone['p99_ms']:.2f} ms | {alone['rps']:,.0f} |",
        f"| while the other spins | {spun['p50_ms']:.2f} ms | {spun['p99_ms']:.2f} ms | {spun['rps']:,.0f} |",
        "",
        f"p50 while the other spins / alone: {ratio:.2f}× (before the scoring pool of issue 11, commit 5315b94",
        "measured 55.84 ms against 0.09 ms alone: 620×).",
    ])


def unknown(total):
    binary = build()
    lines = []
    with tempfile.TemporaryDirectory() as store:
        make_store(store)
        server = Server(binary, store)
        try:
            lua = tempfile.NamedTemporaryFile("w", suffix=".lua", delete=False)
            lua.write('wrk.method = "POST"\nwrk.headers["Content-Type"] = "application/json"\n')
            lua.write('counter = 0\nrequest = function()\n  counter = counter + 1\n'
                      '  local name = "no-such-model-" .. math.random(1, 2000000000) .. "-" .. counter\n'
                      '  return wrk.format(nil, "/estimate", nil, \'{"model": "\' .. name .. \'", "rows": [{"x": 1}]}\')\nend\n')
            lua.close()

            def run(seconds):
                out = subprocess.run(["wrk", "-t", "2", "-c", "16", "-d", f"{seconds}s", "-s", lua.name, server.base],
                                     capture_output=True, text=True, check=True).stdout
                return int(re.search(r"(\d+) requests in", out).group(1)), out

            # Warm-up: 500 requests one by one, then the baseline.
            for i in range(500):
                url, body = server.estimate(f"warm-up-{i}", {"rows": [{"x": 1}]})
                req = urllib.request.Request(url, data=body.encode(), headers={"Content-Type": "application/json"})
                try:
                    urllib.request.urlopen(req).read()
                except urllib.error.HTTPError:
                    pass  # 404: the expected answer
            rss_warm = server.rss_kib()
            samples = [rss_warm]
            sent, seconds = 0, 1
            while sent < total:
                n, _ = run(seconds)
                sent += n
                samples.append(server.rss_kib())
                rate = n / seconds
                seconds = max(1, min(10, int((total - sent) / rate) + 1))
            os.unlink(lua.name)
        finally:
            server.stop()
    growth = (samples[-1] - rss_warm) / rss_warm
    lines.append(f"| {sent:,} | {rss_warm / 1024:.1f} MiB | {max(samples) / 1024:.1f} MiB | "
                 f"{samples[-1] / 1024:.1f} MiB | {growth * 100:+.1f} % |")
    if abs(growth) > 0.05:
        raise SystemExit(f"RSS grew {growth * 100:.1f} % across {sent} unknown-model requests")
    replace_section("http-unknown", [
        "## HTTP: requests naming models that do not exist",
        "",
        f"`python3 scripts/http_load.py unknown {total}`: at least {total:,} `POST /estimate` requests naming a",
        "new random model each time (wrk, 2 threads, 16 connections) against `paddock serve` on the",
        "`overstay-risk` store; the server's RSS read from /proc after a warm-up of 500 such requests (the",
        "baseline, same run) and after each burst of wrk; the requests counted are those after the warm-up.",
        f"Machine: {machine()}. (Before the unknown-name check of issue 11, commit 5315b94 grew 23.0 %.)",
        "",
        "| requests | RSS after warm-up | max | end | end vs warm-up |",
        "|---|---|---|---|---|",
        *lines,
        "",
        "A name no model has is answered 404 before anything is kept for it: RSS stays within 5 % of the",
        "warm-up baseline (the script fails otherwise).",
    ])


# Rounds of the lookups cases; the median is reported.
ROUNDS = 3


def without_grid(plan):
    """The demo's features plan without its grid-cell source and feature."""
    lines = [l for l in plan.splitlines() if not l.startswith("grid_load")]
    text = "\n".join(lines) + "\n"
    text = re.sub(r"\[sources\.grid\]\n(?:[^\[\n].*\n)*", "", text)
    return text.replace('keys = ["site", "member", "lat", "lon"]', 'keys = ["site", "member"]')


def lookups(seconds):
    """The demo's `overstay-risk` served three ways in one run: every
    feature carried by the request; site occupancy and member overstay rate
    looked up by key in the demo's tables; the same from Redis."""
    binary = build()
    if not shutil.which("redis-server"):
        raise SystemExit("lookups: needs redis-server (Debian's package of that name)")
    carried = {k: v for k, v in ROW.items() if k not in ("site_occupancy", "member_overstay_rate")}
    context = {"region": "centre", "site": "Market Hall", "member": "m-0307"}
    # Ages are judged at the request's time, so the demo tables stay fresh.
    at = "2026-12-01T18:00:00+01:00"
    port = free_port()
    redis = subprocess.Popen(["redis-server", "--port", str(port), "--bind", "127.0.0.1", "--save", "", "--appendonly", "no"],
                             stdout=subprocess.DEVNULL)
    results = []
    try:
        for _ in range(100):
            if subprocess.run(["redis-cli", "-p", str(port), "ping"], capture_output=True, text=True).stdout.strip() == "PONG":
                break
            time.sleep(0.05)
        for table, key, prefix in (("sites", "site", "site:"), ("members", "member", "member:")):
            rows = subprocess.run([sys.executable, os.path.join(ROOT, "scripts", "table_to_redis.py"),
                                   os.path.join(DEMO, "tables", f"{table}.csv"), key, prefix], capture_output=True, text=True, check=True).stdout
            subprocess.run(["redis-cli", "-p", str(port)], input=rows, capture_output=True, text=True, check=True)
        plans = {
            "carried by the request": None,
            # The same two features as from Redis: the demo's grid-cell feature left out.
            "embedded table": without_grid(open(os.path.join(ROOT, "models", "train-demo", "features.toml")).read()),
            "Redis on loopback": open(os.path.join(ROOT, "models", "train-demo", "features-redis.toml")).read()
            .replace("127.0.0.1:6380", f"127.0.0.1:{port}"),
        }
        # Every case served at once, each by a server of its own, and measured
        # in turn, round after round: a slow moment of the machine falls on
        # every case alike. Each case's median round is reported.
        stores, servers = [], {}
        try:
            for name, plan in plans.items():
                store = tempfile.TemporaryDirectory()
                stores.append(store)
                make_store(store.name)
                if plan:
                    shutil.copytree(os.path.join(DEMO, "tables"), os.path.join(store.name, "tables"))
                    write(os.path.join(store.name, "features.toml"), plan)
                servers[name] = Server(binary, store.name)
            cases = []
            for rows in (1, 64):
                for name, plan in plans.items():
                    server = servers[name]
                    fields = ({"rows": [ROW] * rows, "context": {"region": "centre"}, "at": at} if plan is None
                              else {"rows": [carried] * rows, "context": context, "at": at, "lookups": "all"})
                    url, body = server.estimate("overstay-risk", fields)
                    answer = json.load(urllib.request.urlopen(urllib.request.Request(url, body.encode(), {"Content-Type": "application/json"})))
                    if plan and {f["outcome"] for row in answer["lookups"] for f in row} != {"found"}:
                        raise SystemExit(f"{name}: not every feature was found: {answer['lookups']}")
                    fields.pop("lookups", None)
                    wrk(server, rows, 2, fields=fields)  # warm-up
                    cases.append((name, rows, server, fields))
            runs = {(name, rows): [] for name, rows, _, _ in cases}
            for _ in range(ROUNDS):
                for name, rows, server, fields in cases:
                    r = wrk(server, rows, seconds, fields=fields)
                    if r["non2xx"] or r["socket_errors"]:
                        raise SystemExit(f"{name}, {rows} rows: {r['non2xx']} non-2xx, {r['socket_errors']} socket errors\n{r['raw']}")
                    runs[(name, rows)].append(r)
            for (name, rows), rs in runs.items():
                results.append((name, rows, sorted(rs, key=lambda r: r["rps"])[len(rs) // 2]))
        finally:
            for server in servers.values():
                server.stop()
            for store in stores:
                store.cleanup()
    finally:
        redis.terminate()
        redis.wait(timeout=30)
    table = []
    base = {rows: r["rps"] for name, rows, r in results if name == "carried by the request"}

    def ratio(rows):
        return next(r["rps"] for name, n, r in results if name == "Redis on loopback" and n == rows) / base[rows]

    def status(x):
        return f"{x:.2f}×, target {'met' if x >= 0.8 else 'not met'}"
    for name, rows, r in sorted(results, key=lambda x: x[1]):
        if r["non2xx"] or r["socket_errors"]:
            raise SystemExit(f"{name}, {rows} rows: {r['non2xx']} non-2xx, {r['socket_errors']} socket errors\n{r['raw']}")
        table.append(f"| {rows} | {name} | {r['rps']:,.0f} | {r['rps'] / base[rows]:.2f}× | {r['p50_ms']:.2f} ms | {r['p99_ms']:.2f} ms |")
    replace_section("http-lookups", [
        "## HTTP: requests/s with and without lookups",
        "",
        f"`python3 scripts/http_load.py lookups {seconds}`: `paddock serve` (release) serving the demo's",
        "`overstay-risk`, its site occupancy and member overstay rate carried by the request, or looked up by",
        "the request's `site` and `member` keys in the demo's tables, or in Redis (`redis-server` on loopback,",
        "`models/train-demo/features-redis.toml`, budget 10 ms); every lookup checked `found` first. wrk with 2",
        f"threads and 64 connections for {seconds} s per case; the cases in turn, {ROUNDS} rounds, each case's",
        "median round shown; wrk, the servers and Redis share the machine's cores. The `paddock` binary",
        f"allocates with mimalloc. Machine: {machine()}.",
        "",
        "| rows per request | features | requests/s | vs carried | p50 latency | p99 latency |",
        "|---|---|---|---|---|---|",
        *table,
        "",
        "A request's lookups are awaited on the server's async runtime before it takes a scoring thread",
        "(issue 29); before that, a Redis round trip held one of the two scoring threads and single-row",
        "requests ran at 0.30× (64 rows: 0.42×). The read runs inside the request's own task, on a connection",
        "of the server's runtime that every source on that Redis shares, and rows under the key the row",
        "before read take its answer. Profiled on the way (perf): glibc's allocator locking between threads",
        "had cost every case, most of all the lookups (0.57× and 0.53× before mimalloc and the changes",
        "above). Target (issue 29): 0.8× for both; see the line of each below.",
        "",
        f"- single-row: {status(ratio(1))}",
        f"- 64 rows: {status(ratio(64))}; what remains is CPU the machine's two cores share: Redis's own work",
        "  and the socket's system calls on both ends, which the table does not pay.",
    ])


def free_port():
    import socket
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def capture(seconds, rounds=3):
    """Single-row p99 with capture off, at a 1 % share and at 100 %: a fresh
    server per run, the settings taken in turn round after round so a slow
    spell of the machine falls on all of them."""
    binary = build()
    settings = [("off", ()), ("1 %", ("--capture-share", "0.01")), ("100 %", ("--capture-share", "1"))]
    runs = {name: [] for name, _ in settings}
    counts = {}
    with tempfile.TemporaryDirectory() as store, tempfile.TemporaryDirectory() as captured:
        make_store(store)
        for _ in range(rounds):
            for name, share in settings:
                extra = ("--capture-dir", os.path.join(captured, name.replace(" %", "")), *share) if share else ()
                server = Server(binary, store, extra)
                try:
                    wrk(server, 1, 2)  # warm-up
                    r = wrk(server, 1, seconds)
                    if share:
                        counts[name] = server.get("/store")["capture"]["counts"]
                finally:
                    server.stop()
                if r["non2xx"] or r["socket_errors"]:
                    raise SystemExit(f"capture {name}: {r['non2xx']} non-2xx, {r['socket_errors']} socket errors")
                runs[name].append(r)

    def median(values):
        return sorted(values)[len(values) // 2]

    p99 = {name: [r["p99_ms"] for r in rs] for name, rs in runs.items()}
    rps = {name: median([r["rps"] for r in rs]) for name, rs in runs.items()}
    base = median(p99["off"])
    rows = [
        f"| {name} | {', '.join(f'{v:.2f}' for v in p99[name])} ms | {median(p99[name]):.2f} ms | "
        f"{median(p99[name]) / base:.2f}× | {rps[name]:,.0f} |"
        for name, _ in settings
    ]
    one = median(p99["1 %"])
    within = one <= max(p99["off"])
    c = counts.get("1 %", {})
    replace_section("http-capture", [
        "## HTTP: capturing traffic",
        "",
        f"`python3 scripts/http_load.py capture {seconds}`: `paddock serve` (release build) serving `overstay-risk`",
        f"single-row requests (wrk, 2 threads, 64 connections, {seconds} s per run after a 2 s warm-up), with",
        f"capture off, at a 1 % share and at 100 %, a fresh server per run, {rounds} rounds taking the three in",
        f"turn. Machine: {machine()}.",
        "",
        "| capture | p99 of each round | median p99 | against off | requests/s (median) |",
        "|---|---|---|---|---|",
        *rows,
        "",
        f"Target (issue 31): capture at 1 % adds no measurable latency at p99 — its median p99 {one:.2f} ms "
        f"{'lies within' if within else 'is above'} the spread of the runs with capture off "
        f"({min(p99['off']):.2f}–{max(p99['off']):.2f} ms): {'met' if within else 'not met'}. The last 1 % run sampled "
        f"{c.get('sampled', 0):,} requests, wrote {c.get('written', 0):,} lines by the end of its load (the rest as it stopped), dropped "
        f"{c.get('dropped_queue_full', 0):,}.",
    ])


def main():
    ensure_wrk()
    mode = sys.argv[1] if len(sys.argv) > 1 else "load"
    if mode == "load":
        load(int(sys.argv[2]) if len(sys.argv) > 2 else 15)
    elif mode == "soak":
        soak(int(sys.argv[2]) if len(sys.argv) > 2 else 1_000_000)
    elif mode == "isolation":
        isolation(int(sys.argv[2]) if len(sys.argv) > 2 else 10)
    elif mode == "unknown":
        unknown(int(sys.argv[2]) if len(sys.argv) > 2 else 100_000)
    elif mode == "lookups":
        lookups(int(sys.argv[2]) if len(sys.argv) > 2 else 10)
    elif mode == "capture":
        capture(int(sys.argv[2]) if len(sys.argv) > 2 else 8)
    else:
        raise SystemExit(__doc__)


if __name__ == "__main__":
    main()
