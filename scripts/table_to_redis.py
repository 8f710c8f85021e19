#!/usr/bin/env python3
"""Prints a CSV table as Redis HSET commands, one hash per row, for
`redis-cli` to read from stdin.

    python3 scripts/table_to_redis.py TABLE.csv KEY_COLUMN PREFIX | redis-cli -p PORT

Each row becomes the hash `PREFIX + row[KEY_COLUMN]` with every other
column a field (empty cells are left out), so a features file can read the
same values from Redis that it reads from the table. Values are quoted for
redis-cli; a table with a column it cannot find is refused naming it.
"""
import csv
import sys


def quote(text):
    return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'


def main():
    if len(sys.argv) != 4:
        sys.exit(__doc__)
    path, key, prefix = sys.argv[1:]
    with open(path, newline="") as f:
        rows = csv.DictReader(f)
        if key not in (rows.fieldnames or []):
            sys.exit(f"{path}: no column `{key}` (it has {', '.join(rows.fieldnames or [])})")
        for n, row in enumerate(rows, start=2):
            if not row[key]:
                sys.exit(f"{path}: line {n}: the key column `{key}` is empty")
            fields = [(c, v) for c, v in row.items() if c != key and v not in ("", None)]
            if fields:
                print("HSET", quote(prefix + row[key]), " ".join(f"{quote(c)} {quote(v)}" for c, v in fields))


if __name__ == "__main__":
    main()
