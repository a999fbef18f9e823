"""BLAS is held to one thread while artifactclean computes (artifactclean/_blas.py)."""

import threading
import warnings

import numpy as np
import threadpoolctl

from artifactclean import TemplateSubtraction, clean
from artifactclean._blas import one_blas_thread


def _blas_threads() -> int:
    return max(i["num_threads"] for i in threadpoolctl.threadpool_info() if i["user_api"] == "blas")


def test_a_fit_runs_blas_on_one_thread_and_gives_the_limit_back(rec10_dac, monkeypatch):
    x, fs = rec10_dac.data[:, : int(4 * rec10_dac.fs)], rec10_dac.fs
    seen = []
    estimate = TemplateSubtraction._estimate
    monkeypatch.setattr(TemplateSubtraction, "_estimate", lambda self, *a: seen.append(_blas_threads()) or
                        estimate(self, *a))
    with threadpoolctl.threadpool_limits(limits=2, user_api="blas"):
        before = _blas_threads()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            clean(x, fs)
        assert seen == [1] and _blas_threads() == before


def test_the_main_threads_limit_covers_other_threads_and_only_it_sets_one():
    """The worker threads that clean channel groups run under the main thread's limit; a computation on another
    thread alone changes nothing (OpenBLAS takes a larger count back only from the main thread: a limit set and
    restored there would have stayed at one)."""
    with threadpoolctl.threadpool_limits(limits=2, user_api="blas"):
        before = _blas_threads()
        seen = []

        def other():
            with one_blas_thread:
                seen.append(_blas_threads())

        with one_blas_thread:
            with one_blas_thread:  # nested: left, still limited
                pass
            t = threading.Thread(target=other)
            t.start()
            t.join(10)
            assert _blas_threads() == 1
        assert _blas_threads() == before
        t = threading.Thread(target=other)
        t.start()
        t.join(10)
        assert seen == [1, before] and _blas_threads() == before


def test_the_result_does_not_depend_on_the_blas_threads_outside():
    """OpenBLAS splits some reductions between its threads: with two of them the template's output with a DAC
    differed in its last bits from one thread's (6e-12 uV at 20 Hz, 6e-10 at 40 Hz; session 35). On a machine
    with one core this cannot fail."""
    from artifactclean.scenarios import make_scenario

    rec = make_scenario("modulated_40hz_dac", seed=1, duration_s=6)
    out = []
    for n in (1, 2):
        with threadpoolctl.threadpool_limits(limits=n, user_api="blas"), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            out.append(clean(rec.data, rec.fs))
    np.testing.assert_array_equal(*out)
