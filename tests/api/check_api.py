#!/usr/bin/env python3
"""The HTTP API against outside tools: schemathesis and an OpenMetrics parser.

    python3 tests/api/check_api.py PADDOCK_BINARY STORE_DIR [EXAMPLES]

Starts `paddock serve` on the store at a free loopback port with an admin
token, then:
1. runs schemathesis (PyPI, pinned by `cargo xtask test`) against the served
   OpenAPI document, in positive mode (valid requests only), for a bounded
   number of examples per operation with a fixed seed, checking: no 5xx
   (`not_a_server_error`), every status code documented, content types and
   headers as documented, every body matching its schema;
2. parses GET /metrics with prometheus_client's OpenMetrics parser (the
   reference parser of the OpenMetrics text format in Python), and checks the
   families it finds;
3. stops the server with SIGTERM and checks that it exits 0 after draining.
Exits non-zero on any failure.
"""
import os
import secrets
import signal
import subprocess
import sys
import urllib.request

from prometheus_client.openmetrics.parser import text_string_to_metric_families


def main():
    binary, store = sys.argv[1], sys.argv[2]
    examples = sys.argv[3] if len(sys.argv) > 3 else "30"
    token = secrets.token_hex(16)
    env = dict(os.environ, PADDOCK_ADMIN_TOKEN=token)
    server = subprocess.Popen(
        [binary, "serve", "--store", store, "--listen", "127.0.0.1:0", "--rescan-secs", "3600"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env, text=True,
    )
    try:
        first = server.stdout.readline().strip()
        if not first.startswith("listening on "):
            raise SystemExit(f"the server did not start: {first!r} {server.stderr.read()}")
        base = first.removeprefix("listening on ")
        print(f"check_api: server at {base}", flush=True)

        checks = ",".join([
            "not_a_server_error",
            "status_code_conformance",
            "content_type_conformance",
            "response_headers_conformance",
            "response_schema_conformance",
        ])
        run = subprocess.run(
            # The same interpreter's schemathesis, whether or not its script is on PATH.
            [sys.executable, "-c", "import sys; from schemathesis.cli import schemathesis; sys.exit(schemathesis())",
             "run", f"{base}/openapi.json", "--checks", checks, "--mode", "positive",
             "--max-examples", examples, "--seed", "20261201", "--header", f"Authorization: Bearer {token}",
             "--no-color"],
        )
        if run.returncode != 0:
            raise SystemExit(f"schemathesis failed (exit {run.returncode})")

        text = urllib.request.urlopen(f"{base}/metrics").read().decode()
        families = {f.name: f for f in text_string_to_metric_families(text)}
        for name, kind in [("paddock_calls", "counter"), ("paddock_call_seconds", "histogram"),
                           ("paddock_generation", "gauge"), ("paddock_artifacts", "gauge")]:
            if name not in families or families[name].type != kind:
                raise SystemExit(f"/metrics: no {kind} family {name}; found {sorted(families)}")
        calls = sum(s.value for s in families["paddock_calls"].samples)
        print(f"check_api: /metrics parsed as OpenMetrics: {len(families)} families, {int(calls)} calls counted")
        if calls == 0:
            raise SystemExit("/metrics counted no calls after the schemathesis run")
    finally:
        server.send_signal(signal.SIGTERM)
        try:
            code = server.wait(timeout=30)
        except subprocess.TimeoutExpired:
            server.kill()
            raise SystemExit("the server did not stop within 30 s of SIGTERM")
    if code != 0:
        raise SystemExit(f"the server exited with {code} after SIGTERM: {server.stderr.read()}")
    print("check_api: passed; the server drained and exited 0")


if __name__ == "__main__":
    main()
