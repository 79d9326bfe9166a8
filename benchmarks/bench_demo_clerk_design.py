"""What the case-level clerk design adds to the demo's build time: interleaved A B A B, medians.

Prints figures; it is not a test. A builds the demo with the clerk design step replaced by a no-op, B builds the
whole demo (leave-out clerk share from the assignments, JIVE1/UJIVE beside 2SLS on the clerk dummies, jackknife
Anderson-Rubin, derived data file). Both write to temporary folders. Wall time and this process's CPU time are
printed; on a shared machine the CPU time is the steadier of the two.

    .venv/bin/python benchmarks/bench_demo_clerk_design.py            # 3 rounds
    .venv/bin/python benchmarks/bench_demo_clerk_design.py --rounds 5
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path
from unittest import mock

from ivdossier.workflows import demo


def build(out: Path, with_design: bool) -> tuple[float, float]:
    start, cpu = time.perf_counter(), time.process_time()
    if with_design:
        demo.build_demo(out, replace=True)
    else:
        with mock.patch.object(demo, "_clerk_design", lambda *a, **k: ""):
            demo.build_demo(out, replace=True)
    return time.perf_counter() - start, time.process_time() - cpu


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=3)
    args = ap.parse_args()
    times: dict[str, list[tuple[float, float]]] = {"A without design": [], "B with design": []}
    with tempfile.TemporaryDirectory() as tmp:
        build(Path(tmp) / "warm", True)  # imports and caches, not counted
        for i in range(args.rounds):
            times["A without design"].append(build(Path(tmp) / f"a{i}", False))
            times["B with design"].append(build(Path(tmp) / f"b{i}", True))
    for name, values in times.items():
        wall, cpu = [v[0] for v in values], [v[1] for v in values]
        print(
            f"{name:>18}: wall median {statistics.median(wall):.2f} s ({', '.join(f'{v:.2f}' for v in wall)}); "
            f"CPU median {statistics.median(cpu):.2f} s ({', '.join(f'{v:.2f}' for v in cpu)})"
        )


if __name__ == "__main__":
    main()
