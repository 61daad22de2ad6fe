"""One BLAS thread while the Study computes, and the user's setting restored afterwards."""
import threading

import numpy as np
import pytest
from threadpoolctl import threadpool_info, threadpool_limits

import afterfit as af
from afterfit.model.threads import one_blas_thread


def _blas_threads():
    found = [p["num_threads"] for p in threadpool_info() if p["user_api"] == "blas"]
    return found[0] if found else None


def test_limit_is_one_inside_and_restored_after_nesting_and_threads():
    if _blas_threads() is None:
        pytest.skip("no BLAS library that threadpoolctl can see (nothing to limit)")
    with threadpool_limits(2, user_api="blas"):
        outside = _blas_threads()
        seen = []
        with one_blas_thread():
            seen.append(_blas_threads())
            with one_blas_thread():  # nested: still one, and not restored too early
                seen.append(_blas_threads())
            seen.append(_blas_threads())

            def other():
                with one_blas_thread():
                    seen.append(_blas_threads())

            t = threading.Thread(target=other)
            t.start()
            t.join()
            seen.append(_blas_threads())
        assert seen == [1, 1, 1, 1, 1]
        assert _blas_threads() == outside


def test_study_results_do_not_depend_on_the_limit():
    # the same numbers with the limit (as the Study runs) and without (plain numpy)
    rng = np.random.default_rng(3)
    X = rng.normal(size=(500, 4))
    with one_blas_thread():
        a = X.T @ X
    np.testing.assert_allclose(a, X.T @ X, rtol=1e-12)
    df = af.demo.orchard()
    s = af.Study(df, df.attrs["first_formula"])
    before = _blas_threads()
    s.fit, s.influence, s.cv, s.checks()
    assert _blas_threads() == before  # the user's setting is back after every computation
