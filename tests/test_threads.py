"""The thread policy: defaults, overrides, bad values, and that the BLAS limit takes hold."""

import pytest
from threadpoolctl import threadpool_info

from isoscope import analysis, threads
from isoscope.errors import InputError
from isoscope.spec import parse_spec


def test_defaults_and_overrides():
    assert threads.thread_policy({}) == threads.ThreadPolicy(1, None, "default")
    p = threads.thread_policy({threads.BLAS_ENV: "2", threads.XLA_ENV: " 3 "})
    assert (
        (p.blas, p.xla) == (2, 3) and threads.BLAS_ENV in p.source and threads.XLA_ENV in p.source
    )


@pytest.mark.parametrize("raw", ["0", "-1", "two", "1.5"])
def test_bad_thread_counts_are_input_errors(raw):
    with pytest.raises(
        InputError, match=f"{threads.BLAS_ENV} = '{raw}' is not a thread count.*>= 1"
    ):
        threads.thread_policy({threads.BLAS_ENV: raw})


def test_xla_count_is_written_once_and_never_over_an_explicit_one():
    env = {threads.XLA_ENV: "1"}
    assert threads.configure_xla(env) == 1 and env["PJRT_NPROC"] == "1"
    env = {threads.XLA_ENV: "1", "PJRT_NPROC": "2"}
    assert threads.configure_xla(env) is None and env["PJRT_NPROC"] == "2"
    assert threads.configure_xla({threads.XLA_ENV: "many"}) is None  # reported later, not at import


def _blas_counts():
    return {i["filepath"]: i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"}


def test_blas_limit_holds_inside_and_is_restored_after():
    before = _blas_counts()
    with threads.limited_blas(threads.ThreadPolicy(1, None, "test")):
        inside = _blas_counts()
    # SciPy's LAPACK (the one JAX's QR and SVD call) is loaded and held to one thread
    assert any("scipy" in path for path in inside) and set(inside.values()) == {1}
    assert {k: v for k, v in _blas_counts().items() if k in before} == before


def test_analyze_reports_progress_after_each_draw_and_runs_under_the_limit(monkeypatch):
    seen = []

    def progress(done, total):
        seen.append((done, total, set(_blas_counts().values())))

    spec = parse_spec({"network": {"width": 16, "depth": 4}, "analysis": {"inputs": 3, "seed": 0}})
    monkeypatch.setenv(threads.BLAS_ENV, "1")
    analysis.analyze(spec, progress=progress)
    assert [(d, t) for d, t, _ in seen] == [(1, 3), (2, 3), (3, 3)]
    assert all(counts == {1} for _, _, counts in seen)
    monkeypatch.setenv(threads.BLAS_ENV, "zero")
    with pytest.raises(InputError, match=threads.BLAS_ENV):
        analysis.analyze(spec)
