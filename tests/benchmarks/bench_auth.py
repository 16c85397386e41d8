"""What checking tokens costs a call: GetRun round trips on an open server and on one with
tokens (a reader token; and the run's writer token, which needs the run id and a digest
comparison), side by side in one run. Loopback, one process; prints calls per second.

    PYTHONPATH=client:service python tests/benchmarks/bench_auth.py [calls]
"""

from __future__ import annotations

import sys
import tempfile
import time

import penumbra_shim as ps
from penumbra_server.server import BackgroundServer
from penumbra_server.server.tokens import TokenBook, TokenEntry, token_digest

READER, OPENER = "bench-reader-token-0123456789", "bench-opener-token-0123456789"


def _rate(client: ps.Client, run_id: str, calls: int) -> float:
    client.get_run(run_id)  # connect first
    start = time.perf_counter()
    for _ in range(calls):
        client.get_run(run_id)
    return calls / (time.perf_counter() - start)


def main(calls: int = 2000) -> None:
    spec = ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", (0.0, 0.0, 0.0), 1.0),), name="bench")
    book = TokenBook((TokenEntry("reader", "reader", token_digest(READER)),
                      TokenEntry("opener", "opener", token_digest(OPENER))))
    rates = {}
    with tempfile.TemporaryDirectory() as root_open, tempfile.TemporaryDirectory() as root_tokens, \
            BackgroundServer(archive_root=root_open, workers=1) as open_server, \
            BackgroundServer(archive_root=root_tokens, workers=1, token_book=book) as token_server:
        with ps.connect(open_server.address) as client:
            run = client.open_run(spec, cache_results=False)
            with ps.connect(token_server.address, token=OPENER) as writer, \
                    ps.connect(token_server.address, token=READER) as reader:
                guarded = writer.open_run(spec, cache_results=False)
                for _ in range(2):  # alternate, so that drifts in machine load hit every case alike
                    rates.setdefault("open server", []).append(_rate(client, run.run_id, calls))
                    rates.setdefault("reader token", []).append(_rate(reader, guarded.run_id, calls))
                    rates.setdefault("writer token", []).append(_rate(writer, guarded.run_id, calls))
                guarded.close()
            run.close()
    base = max(rates["open server"])
    for name, values in rates.items():
        print(f"{name:>13}: {max(values):8.0f} GetRun calls/s (best of {len(values)}), "
              f"{max(values) / base:.2f} x the open server")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 2000)
