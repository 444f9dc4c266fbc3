"""``python -m tests.app.hostile``: build the corpus in a temporary folder, run it, print the figures."""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

from tests.app.hostile.corpus import build_corpus
from tests.app.hostile.runner import run_all, summary


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--only", default="")
    ap.add_argument("--show", action="store_true", help="print every case's first output line")
    ap.add_argument("--cold", action="store_true", help="a fresh interpreter per case (imports in its time)")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        cases = [c for c in build_corpus(Path(tmp)) if args.only in c.name]
        start = time.monotonic()
        outcomes = run_all(cases, workers=args.workers, warm=not args.cold)
        if args.show:
            for o in outcomes:
                first = next((ln for ln in o.output.splitlines() if ln.strip()), "")
                print(f"{o.case.name:40s} {o.kind:9s} {o.exit_code!s:4s} {o.seconds:5.1f}s {o.max_rss_mb:5.0f}MB {first[:150]}")
        print(summary(outcomes))
        print(f"wall time {time.monotonic() - start:.0f} s with {args.workers} workers")


if __name__ == "__main__":
    main()
