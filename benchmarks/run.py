"""Run fieldfix benchmarks and print each ratio against its same-run baseline and peak memory.

Usage::

    python benchmarks/run.py                 # every benchmarks/bench_*.py, full size
    python benchmarks/run.py --quick         # smaller sizes, for a smoke run
    python benchmarks/run.py unwarp plan     # only bench_unwarp.py and bench_plan.py
    python benchmarks/run.py pairs           # field from reversed phase-encode pairs (bench_pairs.py)
    python benchmarks/run.py fieldmap        # the 7 T field map, fresh processes (bench_fieldmap.py)
    python benchmarks/run.py align          # field-map alignment and motion (bench_align.py)
    python benchmarks/run.py unwarp_files    # the unwarp command on .nii.gz runs, fresh processes
    python benchmarks/run.py placement       # where the field map lands, against the scenarios' truth
    python benchmarks/run.py --json results.json
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import math
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))


def _load(path: Path):
    spec = importlib.util.spec_from_file_location(path.stem, path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _fmt(value) -> str:
    if isinstance(value, float):
        return "inf" if math.isinf(value) else f"{value:.4g}"
    return str(value)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("names", nargs="*", help="benchmark topics (bench_<topic>.py); all when omitted")
    parser.add_argument("--quick", action="store_true", help="small sizes")
    parser.add_argument("--json", metavar="FILE", help="also write all records to this JSON file")
    args = parser.parse_args(argv)
    files = sorted(HERE.glob("bench_*.py"))
    if args.names:
        files = [f for f in files if f.stem.removeprefix("bench_") in args.names]
        if not files:
            parser.error(f"no benchmark named {' '.join(args.names)}")
    records = []
    for path in files:
        print(f"== {path.stem} ==", flush=True)
        for record in _load(path).run(quick=args.quick):
            record.pop("_results", None)
            records.append(record)
            keys = [k for k in record if k not in ("benchmark", "goal")]
            print(f"  {record['benchmark']}: " + ", ".join(f"{k}={_fmt(record[k])}" for k in keys), flush=True)
            if "goal" in record:
                print(f"    goal: {record['goal']}" + (f" -> {'met' if record['met'] else 'NOT met'}"
                                                      if "met" in record else ""), flush=True)
    if args.json:
        Path(args.json).write_text(json.dumps(records, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
