"""Benchmark: the issue-14 panels at full size through the real pass, week by week.

Run by hand under ``nice`` (CI does not run it; pytest does not collect it):

    nice /work/venv/bin/python tests/benchmarks/bench_stable_panel.py [--series 200]
        [--weeks 156] [--seed 14] [--only iid|ar|planted]

Three panels of ``tests/panel.py`` (seeded, invented data; window 52, every other setting at
its default), each replayed through ``monitor.passes.run_pass`` once per weekly delivery:

1. stable series, iid normal errors;
2. stable series, AR(1) errors with rho 0.3;
3. iid errors with changes planted in 20 % of the series at week 104 (slope +30 %, level shift
   of 3 error SDs, error SD doubled; a third each).

Printed per panel and kind: how many untouched series ever got a finding of that kind over the
replay, and the share; the share with any warning or critical finding; for the planted panel,
each change's detection by the kinds that name it with the median delay in weeks, and how many
of the coverage findings raised over the whole replay were on untouched series. The targets
(issue 14, "What it must show"): at most 5 % of stable series with a warning or critical
finding and at most 5 % with each notice kind; with AR(1) errors ``autocorrelation`` on most
series and nothing else above those rates; each planted change found in at least 90 % of its
series; coverage findings on untouched series within the FDR (10 %) over the whole replay.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from panel import PanelSpec, run_panel


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=200)
    parser.add_argument("--weeks", type=int, default=156)
    parser.add_argument("--seed", type=int, default=14)
    parser.add_argument("--only", choices=("iid", "ar", "planted"))
    args = parser.parse_args()
    specs = {
        "iid": PanelSpec(series=args.series, weeks=args.weeks, seed=args.seed),
        "ar": PanelSpec(series=args.series, weeks=args.weeks, seed=args.seed, rho=0.3),
        "planted": PanelSpec(series=args.series, weeks=args.weeks, seed=args.seed,
                             planted_share=0.2),
    }
    for name, spec in specs.items():
        if args.only and name != args.only:
            continue
        result = run_panel(spec)
        print(result.table(), flush=True)
        print(flush=True)


if __name__ == "__main__":
    main()
