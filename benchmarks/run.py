"""Run every ``benchmarks/bench_*.py`` module's ``main()``.

Usage: ``python -m benchmarks.run [FILTER ...]``. With filters, only the modules whose name
(without the ``bench_`` prefix) contains one of them are run. Modules are found on disk, so
a new ``bench_<topic>.py`` is picked up without registration. Exit status 1 if any failed.
"""

from __future__ import annotations

import importlib
import pathlib
import sys
import time
import traceback

HERE = pathlib.Path(__file__).resolve().parent


def discover(filters: list[str] | None = None) -> list[str]:
    """Names of the benchmark modules (``bench_<topic>``), sorted, optionally filtered."""
    names = sorted(p.stem for p in HERE.glob("bench_*.py"))
    if filters:
        names = [n for n in names if any(f in n.removeprefix("bench_") for f in filters)]
    return names


def machine_line() -> str:
    """One line on the processor and numpy's vector routines, printed before the figures.

    Ratios against ERFA (astropy, pyerfa) move with the processor: numpy computes sines,
    cosines and arc tangents of arrays several at a time with AVX-512 and one at a time
    without it, while ERFA works one at a time on any processor (README, Performance).
    """
    import os
    import platform

    import numpy as np

    model = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo") as f:
            model = next(
                (ln.split(":", 1)[1].strip() for ln in f if ln.startswith("model name")), model
            )
    except OSError:
        pass
    try:  # numpy's own record of what this processor offers (as numpy.show_runtime())
        from numpy._core._multiarray_umath import __cpu_features__ as features
    except ImportError:
        features = {}
    simd = ", ".join(
        f"{name} {'yes' if features[name] else 'no'}"
        for name in (
            ("ASIMD",) if platform.machine() in ("aarch64", "arm64") else ("AVX512F", "AVX2")
        )
        if name in features
    )
    return (
        f"machine: {model}, {os.cpu_count()} CPUs; numpy {np.__version__}; {simd or 'SIMD unknown'}"
    )


def main(argv: list[str] | None = None) -> int:
    filters = list(sys.argv[1:] if argv is None else argv)
    names = discover(filters)
    if not names:
        print(f"no benchmark matches {filters}", file=sys.stderr)
        return 1
    print(machine_line(), flush=True)
    failed = []
    for name in names:
        print(f"=== {name} ===", flush=True)
        start = time.perf_counter()
        try:
            module = importlib.import_module(f"{__package__ or 'benchmarks'}.{name}")
            module.main()
        except SystemExit as exc:  # a main() that exits: only a non-zero code is a failure
            if exc.code not in (0, None):
                failed.append(name)
        except Exception:  # report and go on with the others
            traceback.print_exc()
            failed.append(name)
        print(f"=== {name}: {time.perf_counter() - start:.1f} s ===\n", flush=True)
    if failed:
        print(f"failed: {', '.join(failed)}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
