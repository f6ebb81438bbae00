"""The full fuzz campaign of the CLI: the battery (every command x input x damage once)
and a seeded random campaign, in-process (tests/fuzzing.py), with the counts of each rule.

    python benchmarks/fuzz_campaign.py [--runs 10000] [--seed 1] [--minutes 0 (no limit)]

Prints the command, the machine, the counts (tracebacks, exit-0 invalid outputs, files
left behind by failed runs, inputs overwritten) and every failing case with its symptom,
grouped by (command, target, rule).  Exit status 1 when any rule was broken.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import tempfile
from collections import defaultdict
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

import fuzzing  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=10_000, help="random runs after the battery")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--minutes", type=float, default=0.0, help="time limit (0: none)")
    args = ap.parse_args()

    import seqstate

    print("command:", " ".join([Path(sys.executable).name, *sys.argv]))
    print(
        f"machine: {platform.machine()}, {os.cpu_count()} cores, Python "
        f"{platform.python_version()}, seqstate {seqstate.__version__}"
    )
    with tempfile.TemporaryDirectory(prefix="seqstate-fuzz-") as tmp:
        root = Path(tmp)
        fuzzing.make_inputs(root)
        limit = args.minutes * 60 or None
        battery = fuzzing.run_cases(fuzzing.battery(args.seed), root, root / "w")
        print(f"battery: {len(fuzzing.battery(args.seed))} cases")
        print("\n".join("  " + ln for ln in battery.lines()))
        camp = fuzzing.run_cases(
            fuzzing.random_cases(args.seed), root, root / "w", max_runs=args.runs, max_seconds=limit
        )
        print(f"campaign: seed {args.seed}")
        print("\n".join("  " + ln for ln in camp.lines()))
    groups: dict[tuple[str, str, str], list[str]] = defaultdict(list)
    for case, rule, symptom in battery.failures + camp.failures:
        groups[(case.command, case.target, rule)].append(
            f"{case.damage} seed {case.seed}: {symptom}"
        )
    print(f"failing cases: {sum(len(v) for v in groups.values())} in {len(groups)} groups")
    for (cmd, target, rule), items in sorted(groups.items()):
        print(f"- {cmd} / {target} / {rule}: {len(items)} run(s), e.g. {items[0]}")
    sys.exit(1 if groups else 0)


if __name__ == "__main__":
    main()
