"""Speed of the HTTP service on loopback (prints figures, asserts nothing).

For each store (SQLite file; PostgreSQL) and one or two ``adaptive-engine serve`` processes
on it, 1, 8 and 32 concurrent clients run whole sessions of the Meridian Valley licensing
exam (release ``meridian-licensing``) back to back for a fixed time, each client on
keep-alive connections, spreading its requests over the servers in turn.  Printed per run:

* answers per second (answer requests completed, all clients together);
* p50 and p95 latency of an answer request, as the client sees it;
* errors (any reply but 200/201) and lost answers: answers the service acknowledged that
  the store does not hold, and exposure counters that differ from a recount of the log.

Targets on two cores: p95 under 25 ms at 32 clients, 400 answers/s or more on SQLite,
nothing lost.  Clients run in this process (threads), on the same two cores as the servers.
The clients send their next answer as soon as they have a reply (a stress test: with C
clients and a throughput of X answers/s the mean latency is C / X, Little's law); the last
rows give each client a think time (exponential, mean ``--think-ms``, default 100 ms)
between answers, a load nearer to examinees reading items.

Then the population run: 32 clients start 200 sessions at once through two servers on one
PostgreSQL store and run them to the end; every session must finish with no error, and the
exposure counts must equal a recount from the event log.

Run: ``python3 benchmarks/bench_service.py [--quick] [--seconds S] [--backends sqlite,postgresql]``.
PostgreSQL from ``ADAPTIVE_ENGINE_TEST_POSTGRES`` (default
``postgresql://postgres@127.0.0.1:5432/test``); the script makes a schema of its own and drops it.
"""

from __future__ import annotations

import argparse
import contextlib
import http.client
import json
import os
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
import urllib.parse
import urllib.request
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from adaptive_engine.bank import load_bank  # noqa: E402
from adaptive_engine.design.toml_file import read_design  # noqa: E402
from adaptive_engine.live.releases import publish_release  # noqa: E402
from adaptive_engine.live.store import open_store  # noqa: E402
from adaptive_engine.live.tokens import new_token  # noqa: E402

POSTGRES = os.environ.get("ADAPTIVE_ENGINE_TEST_POSTGRES", "postgresql://postgres@127.0.0.1:5432/test")
RELEASE = "meridian-licensing"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Servers:
    """``adaptive-engine serve`` processes on one store, on free loopback ports."""

    def __init__(self, store: str, tokens: Path, count: int, folder: Path):
        env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
        self.ports = [free_port() for _ in range(count)]
        self.processes = [subprocess.Popen(
            [sys.executable, "-m", "adaptive_engine", "serve", "--store", store, "--tokens", str(tokens),
             "--port", str(port), "--no-access-log", "--log-level", "warning", "--store-connections", "8"],
            env=env, stdout=open(folder / f"server-{port}.log", "wb"), stderr=subprocess.STDOUT,
            start_new_session=True) for port in self.ports]
        for port in self.ports:
            deadline = time.monotonic() + 120
            while True:
                try:
                    with urllib.request.urlopen(f"http://127.0.0.1:{port}/healthz", timeout=2):
                        break
                except OSError:
                    if time.monotonic() > deadline:
                        raise RuntimeError((folder / f"server-{port}.log").read_text()[-2000:]) from None
                    time.sleep(0.1)

    def stop(self) -> None:
        for p in self.processes:
            with contextlib.suppress(ProcessLookupError):
                os.killpg(p.pid, signal.SIGTERM)
        for p in self.processes:
            p.wait(30)


class Client:
    """One examinee-simulating client: keep-alive connections to every server."""

    def __init__(self, ports, secret, seed, think=0.0):
        self.think = think
        self.conns = [http.client.HTTPConnection("127.0.0.1", port, timeout=60) for port in ports]
        self.headers = {"Authorization": f"Bearer {secret}", "Content-Type": "application/json"}
        self.rng = np.random.default_rng(seed)
        self.turn = 0
        self.latencies: list[float] = []
        self.errors: list[str] = []
        self.acknowledged: dict[str, int] = {}

    def call(self, path, body):
        conn = self.conns[self.turn % len(self.conns)]
        self.turn += 1
        conn.request("POST", path, body=json.dumps(body), headers=self.headers)
        response = conn.getresponse()
        data = response.read()
        if response.status not in (200, 201):
            raise RuntimeError(f"{response.status} {data[:200]!r}")
        return json.loads(data)

    def session(self, k, stop_at=None):
        reply = self.call("/v1/sessions", {"release": RELEASE, "examinee": f"bench-{k}", "seed": k})
        session_id = reply["session_id"]
        self.acknowledged[session_id] = 0
        theta = self.rng.normal()
        while not reply["done"]:
            if stop_at is not None and time.perf_counter() > stop_at:
                return False
            # a plausible examinee: right with probability rising with ability
            right = int(self.rng.random() < 1 / (1 + np.exp(-(theta - self.rng.normal(0, 1)))))
            if self.think:
                time.sleep(self.rng.exponential(self.think))
            t0 = time.perf_counter()
            reply = self.call(f"/v1/sessions/{session_id}/answers",
                              {"item_id": reply["item_id"], "response": right})
            self.latencies.append(time.perf_counter() - t0)
            self.acknowledged[session_id] += 1
        return True

    def close(self):
        for c in self.conns:
            c.close()


def check_store(store_location, clients) -> tuple[int, bool]:
    """(answers acknowledged but not stored, exposure counters equal to a recount)."""
    lost = 0
    with open_store(store_location) as store:
        for client in clients:
            for session_id, n in client.acknowledged.items():
                lost += max(0, n - len(store.answers(session_id)))
        bank_id = store.releases(name=RELEASE)[0]["bank_id"]
        exact = store.exposure(bank_id) == store.recount_exposure(bank_id)
    return lost, exact


def timed_run(ports, secret, n_clients, seconds, first_seed, think=0.0):
    clients = [Client(ports, secret, first_seed + c, think) for c in range(n_clients)]
    stop_at = time.perf_counter() + seconds
    counter = iter(range(first_seed * 1000, first_seed * 1000 + 10**6))
    lock = threading.Lock()

    def loop(client):
        try:
            while time.perf_counter() < stop_at:
                with lock:
                    k = next(counter)
                client.session(k, stop_at)
        except Exception as exc:  # counted and printed
            client.errors.append(repr(exc))

    threads = [threading.Thread(target=loop, args=(c,)) for c in clients]
    t0 = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    elapsed = time.perf_counter() - t0
    for c in clients:
        c.close()
    return clients, elapsed


def population_run(ports, secret, n_clients=32, n_sessions=200):
    """n_sessions started at once by n_clients, each run to its end."""
    clients = [Client(ports, secret, 50_000 + c) for c in range(n_clients)]
    barrier = threading.Barrier(n_clients)
    finished = []

    def loop(c, client):
        try:
            barrier.wait(60)
            for k in range(c, n_sessions, n_clients):
                if client.session(90_000 + k):
                    finished.append(k)
        except Exception as exc:  # counted and printed
            client.errors.append(repr(exc))

    threads = [threading.Thread(target=loop, args=(c, client)) for c, client in enumerate(clients)]
    t0 = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    elapsed = time.perf_counter() - t0
    for c in clients:
        c.close()
    return clients, finished, elapsed


@contextlib.contextmanager
def fresh_store(backend, folder):
    if backend == "sqlite":
        yield str(folder / f"bench-{time.monotonic_ns()}.db")
        return
    import psycopg

    schema = f"ae_bench_{os.getpid()}_{time.monotonic_ns() % 10**9}"
    with psycopg.connect(POSTGRES, autocommit=True) as conn:
        conn.execute(f"CREATE SCHEMA {schema}")
    parts = urllib.parse.urlsplit(POSTGRES)
    query = urllib.parse.urlencode(urllib.parse.parse_qsl(parts.query) + [("options", f"-csearch_path={schema}")])
    try:
        yield urllib.parse.urlunsplit(parts._replace(query=query))
    finally:
        with psycopg.connect(POSTGRES, autocommit=True) as conn:
            conn.execute(f"DROP SCHEMA IF EXISTS {schema} CASCADE")


def prepare(store_location, folder):
    with open_store(store_location) as store:
        publish_release(store, read_design(ROOT / "simulations" / "licensing_exam.toml"),
                        load_bank(ROOT / "item_banks" / "meridian_valley_operator.csv"), name=RELEASE)
    tokens = folder / f"tokens-{time.monotonic_ns()}.toml"
    return tokens, new_token(tokens, name="bench", role="delivery")[1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short runs (2 s per level), no population run")
    parser.add_argument("--seconds", type=float, default=6.0, help="seconds per client level")
    parser.add_argument("--backends", default="sqlite,postgresql")
    parser.add_argument("--servers", default="1,2")
    parser.add_argument("--clients", default="1,8,32")
    parser.add_argument("--think-ms", type=float, default=100.0,
                        help="mean think time of the paced rows (32 clients; 0: no paced rows)")
    args = parser.parse_args()
    seconds = 2.0 if args.quick else args.seconds
    print(f"{'store':<11} {'servers':>7} {'clients':>7} {'think ms':>8} {'answers/s':>10} {'p50 ms':>8} "
          f"{'p95 ms':>8} {'errors':>6} {'lost':>5} {'counts':>7}")
    levels = [(int(x), 0.0) for x in args.clients.split(",")]
    if args.think_ms > 0:
        levels.append((32, args.think_ms / 1000))
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        for backend in args.backends.split(","):
            for n_servers in (int(x) for x in args.servers.split(",")):
                with fresh_store(backend, folder) as location:
                    tokens, secret = prepare(location, folder)
                    servers = Servers(location, tokens, n_servers, folder)
                    try:
                        timed_run(servers.ports, secret, 4, 1.0, 1)  # warm-up: contexts, connections
                        for n_clients, think in levels:
                            clients, elapsed = timed_run(servers.ports, secret, n_clients, seconds,
                                                         10 + n_clients + int(think > 0), think)
                            lat = np.array([x for c in clients for x in c.latencies]) * 1e3
                            errors = sum(len(c.errors) for c in clients)
                            lost, exact = check_store(location, clients)
                            p50, p95 = (np.percentile(lat, 50), np.percentile(lat, 95)) if lat.size else (np.nan,) * 2
                            print(f"{backend:<11} {n_servers:>7} {n_clients:>7} {think * 1000:>8.0f} "
                                  f"{lat.size / elapsed:>10.0f} "
                                  f"{p50:>8.1f} {p95:>8.1f} {errors:>6} {lost:>5} {'exact' if exact else 'WRONG':>7}",
                                  flush=True)
                            for c in clients:
                                for e in c.errors[:2]:
                                    print("   error:", e)
                    finally:
                        servers.stop()
        if not args.quick and "postgresql" in args.backends:
            with fresh_store("postgresql", folder) as location:
                tokens, secret = prepare(location, folder)
                servers = Servers(location, tokens, 2, folder)
                try:
                    clients, finished, elapsed = population_run(servers.ports, secret)
                finally:
                    servers.stop()
                errors = [e for c in clients for e in c.errors]
                lost, exact = check_store(location, clients)
                with open_store(location) as store:
                    statuses, _ = store.release_counts(RELEASE, None)
                answers = sum(len(c.latencies) for c in clients)
                lat = np.array([x for c in clients for x in c.latencies]) * 1e3
                print(f"\npopulation: 32 clients, 200 sessions at once, 2 servers, PostgreSQL: "
                      f"{len(finished)} finished in {elapsed:.1f} s ({answers} answers, {answers / elapsed:.0f}/s, "
                      f"p50 {np.percentile(lat, 50):.1f} ms, p95 {np.percentile(lat, 95):.1f} ms); "
                      f"store: {statuses}; errors {len(errors)}; lost {lost}; "
                      f"exposure counts {'equal' if exact else 'DIFFER FROM'} a recount of the log")
                for e in errors[:5]:
                    print("   error:", e)


if __name__ == "__main__":
    main()
