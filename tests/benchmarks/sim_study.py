"""Simulation study of the summary's statistics from known truth; writes its table into docs/statistics.md.

Run: python tests/benchmarks/sim_study.py [--pilots 500] [--seed 20261203] [--no-write]
Every figure is computed by server.analytics.simulation, which calls the summary's own functions.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np

from server.analytics import simulation

DOC = Path(__file__).resolve().parents[2] / "docs" / "statistics.md"
START = "<!-- study table: start (written by tests/benchmarks/sim_study.py) -->"
END = "<!-- study table: end -->"


def table(rows: list[simulation.Outcome], pilots: int, seed: int, seconds: float) -> str:
    lines = [
        START,
        f"{pilots} seeded pilots per line (seed {seed}, {seconds:.0f} s on this machine). "
        "Monte Carlo standard error in brackets.",
        "",
        "| check | measure | goal | result | |",
        "|---|---|---|---|---|",
    ]
    for o in rows:
        goal = "" if o.measure == "power" else ("≥ " if o.measure == "coverage" else "≤ ") + f"{o.goal:.0%}"
        verdict = "" if o.measure == "power" else ("meets goal" if o.passed else "**misses goal**")
        lines.append(
            f"| {o.name} | {o.measure} | {goal} | {o.value:.1%} (±{o.monte_carlo_se:.1%}) | {verdict} |"
        )
    lines.append(END)
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--pilots", type=int, default=500)
    parser.add_argument("--seed", type=int, default=20261203)
    parser.add_argument("--no-write", action="store_true", help="print the table only")
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    began = time.perf_counter()
    rows = []
    for check in simulation.study_checks():
        out = simulation.run_check(check, rng, args.pilots)
        print(f"{out.value:7.1%}  {check.measure:9s}  {check.name}", flush=True)
        rows.append(out)
    text = table(rows, args.pilots, args.seed, time.perf_counter() - began)
    if args.no_write:
        print(text)
        return
    doc = DOC.read_text()
    if START in doc and END in doc:
        doc = doc[: doc.index(START)] + text + doc[doc.index(END) + len(END) :]
    else:
        doc = doc.rstrip("\n") + "\n\n" + text + "\n"
    DOC.write_text(doc)
    print(f"table written to {DOC}")


if __name__ == "__main__":
    main()
