"""service.stats.distributions against scipy.stats, bit for bit (the same scipy.special calls)."""

from __future__ import annotations

import numpy as np
from scipy import stats

from service.stats import distributions as dist


def test_the_special_function_shortcuts_equal_scipy_stats_exactly() -> None:
    """scipy.stats' t, F, χ² and normal distributions on a grid of arguments, including the
    non-integer degrees of freedom of Welch–Satterthwaite: equal to the last bit, so switching the
    import changes no archived number."""
    rng = np.random.default_rng(2)
    for q in [1e-9, 0.001, 0.025, 0.05, 0.1, 0.5, 0.9, 0.95, 0.975, 0.999, *rng.random(20)]:
        assert dist.norm_ppf(q) == float(stats.norm.ppf(q))
        for df in [1, 2, 3, 7.5, 10, 22, 23.731, 100, 1e4, *rng.uniform(1, 300, 5)]:
            assert dist.t_ppf(q, df) == float(stats.t.ppf(q, df))
            assert dist.chi2_ppf(q, df) == float(stats.chi2.ppf(q, df))
    for x in [-40.0, -3.2, -1.0, -1e-3, 0.0, 0.4, 1.7, 5.0, 60.0, *rng.normal(0, 3, 20)]:
        assert dist.norm_cdf(x) == float(stats.norm.cdf(x))
        for df in [1, 4, 9.25, 30, 250.5]:
            assert dist.t_cdf(x, df) == float(stats.t.cdf(x, df))
            assert dist.t_sf(x, df) == float(stats.t.sf(x, df))
            if x > 0:
                assert dist.f_sf(x, 2, df) == float(stats.f.sf(x, 2, df))
                assert dist.f_sf(x, 3.0, df) == float(stats.f.sf(x, 3.0, df))


def test_the_engine_does_not_import_scipy_stats() -> None:
    """Start-up: analysing needs scipy.special only (issue on speed; -X importtime showed
    scipy.stats at about half a second)."""
    import subprocess
    import sys
    code = ("import sys, service.cli.analyze; "
            "bad = sorted(m for m in sys.modules if m.split('.')[0] in "
            "('fastapi', 'starlette', 'uvicorn', 'sqlalchemy') or m.startswith('scipy.stats')); "
            "print(bad); sys.exit(1 if bad else 0)")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stdout + done.stderr
