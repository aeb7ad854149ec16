"""Full hostile-input sweep of the nine probeseq commands.

Run:  python tests/benchmarks/sweep_hostile.py [--jobs 2] [--timeout 60] [--list-failures]
                                               [--only TEXT] [--isolation worker|subprocess]
                                               [--json FILE] [--dir DIR] [--keep]

Builds every case of ``tests/hostile_cases`` (malformed ion, range, lattice and run files, damaged
output folders, hostile option values, output paths pointing at inputs, seeded random mutations),
runs each in a pool of worker processes (``--jobs``, each with a wall-time limit) and prints, per
command: cases, clean errors, accepted (valid / with warning / silently), internal errors,
tracebacks, hangs, crashes, unclear error messages, inputs changed, leftover staging folders,
incomplete outputs; then a total line. Exit status 1 when any case broke a property (internal
error, hang, crash, traceback, changed input, leftover staging, incomplete output, silent
acceptance of invalid input, malformed error message). ``--list-failures`` prints every failing
case with its stderr line. Data are made in a temporary folder and deleted afterwards.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
import threading
import time
from concurrent.futures import ThreadPoolExecutor, as_completed
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from hostile_cases import Runner, all_cases, run_case  # noqa: E402
from hostile_cases.base import make_base  # noqa: E402
from hostile_cases.cases import COMMANDS  # noqa: E402

COLUMNS = (
    ("cases", lambda o: True),
    ("clean_err", lambda o: o.status == "clean-error"),
    ("acc_valid", lambda o: o.status == "accepted-valid"),
    ("acc_warn", lambda o: o.status == "accepted-warning"),
    ("acc_silent", lambda o: o.status == "accepted-silently"),
    ("internal", lambda o: "internal error" in o.problems),
    ("traceback", lambda o: "traceback on stderr" in o.problems),
    ("hang", lambda o: o.status == "hang"),
    ("crash", lambda o: o.status == "crash"),
    ("bad_msg", lambda o: any(p.startswith(("error spans", "non-zero exit", "error line is", "2 error", "3 error"))
                             for p in o.problems)),
    ("in_changed", lambda o: any(p.startswith(("input changed", "input removed")) for p in o.problems)),
    ("staging", lambda o: any(p.startswith("leftover staging") for p in o.problems)),
    ("incomplete", lambda o: any(p.startswith(("incomplete output", "wrote outside")) for p in o.problems)),
    ("FAILED", lambda o: o.failed),
)


def table(outcomes) -> str:
    """The per-command table and the total line."""
    head = f"{'command':10s}" + "".join(f"{name:>11s}" for name, _ in COLUMNS)
    lines = [head, "-" * len(head)]
    for cmd in COMMANDS + ("TOTAL",):
        sel = [o for o in outcomes if cmd == "TOTAL" or o.command == cmd]
        if not sel:
            continue
        if cmd == "TOTAL":
            lines.append("-" * len(head))
        lines.append(f"{cmd:10s}" + "".join(f"{sum(1 for o in sel if f(o)):11d}" for _, f in COLUMNS))
    return "\n".join(lines)


def main(argv=None) -> int:
    """Run the sweep; return the exit status."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--jobs", type=int, default=2, help="worker processes (default 2)")
    ap.add_argument("--timeout", type=float, default=60.0, help="wall-time limit per case, s (default 60)")
    ap.add_argument("--isolation", choices=("worker", "subprocess"), default="worker",
                    help="worker: reuse a probeseq process per job (fast); subprocess: one process per case")
    ap.add_argument("--only", default=None, help="run only cases whose id contains this text")
    ap.add_argument("--skip-slow", action="store_true", help="leave out cases that may run a whole analysis")
    ap.add_argument("--list-failures", action="store_true", help="print each failing case with its stderr line")
    ap.add_argument("--json", default=None, help="write every outcome to this JSON file")
    ap.add_argument("--dir", default=None, help="work folder (default: a temporary folder, deleted afterwards)")
    ap.add_argument("--keep", action="store_true", help="keep the input trees of the cases")
    args = ap.parse_args(argv)

    cases = all_cases()
    if args.only:
        cases = [c for c in cases if args.only in c.id]
    if args.skip_slow:
        cases = [c for c in cases if not c.slow]
    # slow cases first, so the long ones overlap with the many short ones
    cases.sort(key=lambda c: not c.slow)
    root = Path(args.dir) if args.dir else Path(tempfile.mkdtemp(prefix="probeseq_hostile_"))
    root.mkdir(parents=True, exist_ok=True)
    local = threading.local()
    runners = []
    lock = threading.Lock()

    def runner():
        if not hasattr(local, "r"):
            local.r = Runner(isolation=args.isolation, timeout=args.timeout)
            with lock:
                runners.append(local.r)
        return local.r

    t0 = time.perf_counter()
    outcomes = []
    try:
        with Runner(isolation=args.isolation, timeout=300.0) as r0:
            base = make_base(root / "base", r0)
        print(f"base data made in {time.perf_counter() - t0:.1f} s; running {len(cases)} cases with "
              f"{args.jobs} jobs, {args.timeout:.0f} s limit each", flush=True)

        def one(case):
            return run_case(case, base, root / "cases", runner(), keep=args.keep)

        with ThreadPoolExecutor(max_workers=max(1, args.jobs)) as ex:
            futs = [ex.submit(one, c) for c in cases]
            for k, fut in enumerate(as_completed(futs), 1):
                o = fut.result()
                outcomes.append(o)
                if k % 100 == 0 or k == len(futs):
                    bad = sum(x.failed for x in outcomes)
                    print(f"  {k}/{len(futs)} cases, {bad} failing, {time.perf_counter() - t0:.0f} s", flush=True)
    finally:
        for r in runners:
            r.close()
        if not args.dir and not args.keep:
            shutil.rmtree(root, ignore_errors=True)
    outcomes.sort(key=lambda o: o.case_id)
    print()
    print(table(outcomes))
    print(f"\n{len(outcomes)} cases in {time.perf_counter() - t0:.0f} s; "
          f"{sum(o.failed for o in outcomes)} failing")
    if args.list_failures:
        print("\nfailing cases:")
        for o in outcomes:
            if o.failed:
                print(f"  {o.case_id} [{o.status}, exit {o.exit_code}] {'; '.join(o.problems)}")
                print(f"      {o.message}")
    if args.json:
        Path(args.json).write_text(json.dumps([o.to_dict() for o in outcomes], indent=1), encoding="utf-8")
        print(f"wrote {args.json}")
    return 1 if any(o.failed for o in outcomes) else 0


if __name__ == "__main__":
    sys.exit(main())
