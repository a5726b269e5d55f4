"""Longer fuzz run of mask loading and manifest parsing, on demand (the CI run is brief).

Runs the properties of tests/commands/test_fuzz.py with many more hypothesis examples:

    python benchmarks/fuzz.py --examples 5000            # known defects set aside, as in CI
    python benchmarks/fuzz.py --examples 5000 --strict   # known defects count as failures
    python benchmarks/fuzz.py --only load_mask --seed 3

Each property prints its example count and time; the first failure is printed with hypothesis'
minimal example and the run exits 1. Research use only; see pipeline.DISCLAIMER.
"""
from __future__ import annotations

import argparse
import os
import sys
import time
import traceback
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path[:0] = [str(HERE.parent), str(HERE.parent / "tests")]

TARGETS = {
    "load_mask": ["test_load_mask_mutated_headers_and_gzip", "test_load_mask_random_bytes"],
    "manifest": ["test_read_manifest_generated_tables", "test_read_manifest_random_bytes"],
}


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--examples", type=int, default=2000,
                        help="hypothesis examples per property (default 2000)")
    parser.add_argument("--only", choices=sorted(TARGETS), help="one target only")
    parser.add_argument("--seed", type=int, default=None, help="hypothesis seed (default random)")
    parser.add_argument("--strict", action="store_true",
                        help="do not set aside the known defects listed in "
                        "tests/commands/test_fuzz.py")
    return parser.parse_args(argv)


def run(name: str, module, examples: int, seed: int | None) -> bool:
    from hypothesis import HealthCheck, given, seed as with_seed, settings

    wrapped = getattr(module, name).hypothesis
    test = given(**wrapped._given_kwargs)(wrapped.inner_test)
    test = settings(max_examples=examples, deadline=None, database=None,
                    suppress_health_check=list(HealthCheck))(test)
    if seed is not None:
        test = with_seed(seed)(test)
    start = time.perf_counter()
    try:
        test()
    except Exception:
        traceback.print_exc()
        print(f"FAILED {name} after {time.perf_counter() - start:.1f} s", flush=True)
        return False
    print(f"ok     {name}: {examples} examples in {time.perf_counter() - start:.1f} s", flush=True)
    return True


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    if args.strict:
        os.environ["LESION_GROWTH_FUZZ_STRICT"] = "1"
    import test_fuzz

    from pipeline import DISCLAIMER

    print(DISCLAIMER)
    names = [n for key in ([args.only] if args.only else sorted(TARGETS)) for n in TARGETS[key]]
    results = [run(name, test_fuzz, args.examples, args.seed) for name in names]
    return 0 if all(results) else 1


if __name__ == "__main__":
    sys.exit(main())
