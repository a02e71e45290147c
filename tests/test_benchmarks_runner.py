"""The benchmark runner finds every benchmarks/bench_*.py module (no timing here)."""

import pathlib

from benchmarks import run

ROOT = pathlib.Path(__file__).resolve().parents[1]


def test_discovers_every_bench_module():
    on_disk = sorted(p.stem for p in (ROOT / "benchmarks").glob("bench_*.py"))
    assert run.discover() == on_disk
    assert "bench_propagation" in on_disk


def test_filter_selects_by_topic():
    assert run.discover(["propagation"]) == ["bench_propagation"]
    assert run.discover(["no-such-topic"]) == []


def test_unmatched_filter_is_an_error(capsys):
    assert run.main(["no-such-topic"]) == 1
    assert "no benchmark matches" in capsys.readouterr().err


def test_machine_line_names_the_vector_routines():
    # numpy's record of the processor's features (numpy.show_runtime() prints the same):
    # whether AVX-512 is there decides much of the ratios against ERFA.
    import numpy as np
    from numpy._core._multiarray_umath import __cpu_features__ as features

    line = run.machine_line()
    assert line.startswith("machine: ") and f"numpy {np.__version__}" in line
    if "AVX512F" in features:
        assert f"AVX512F {'yes' if features['AVX512F'] else 'no'}" in line
