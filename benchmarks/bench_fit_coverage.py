"""Coverage of the 95 % confidence intervals of :func:`clearaudit.physics.fit.fit_catenary`.

Fits many random synthetic spans (exact catenary, isotropic Gaussian noise, random gaps, inclined
spans, some blown out of the vertical) and counts how often the reported 95 % intervals hold the
true catenary constant, sag, attachment heights and tilt. Target: 90-98 %.

Run: ``.venv/bin/python benchmarks/bench_fit_coverage.py [N_SPANS] [SEED]``
"""
from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from test_fit import random_span_parameters, synthetic_span  # noqa: E402

from clearaudit.physics.fit import fit_catenary  # noqa: E402


def run(n_spans: int = 500, seed: int = 2024) -> dict[str, float]:
    rng = np.random.default_rng(seed)
    hits = {"catenary_constant": 0, "sag": 0, "z_a": 0, "z_b": 0, "tilt": 0}
    relative_errors, sag_errors, times, failures = [], [], [], 0
    for _ in range(n_spans):
        params = random_span_parameters(rng)
        span = synthetic_span(rng, **params)
        start = time.perf_counter()
        fit = fit_catenary(span.points, span.support_a_xy, span.support_b_xy)
        times.append(time.perf_counter() - start)
        if not fit.ok:
            failures += 1
            continue
        hits["catenary_constant"] += abs(fit.catenary_constant_m - span.catenary_constant_m) \
            <= fit.catenary_constant_ci95_m
        hits["sag"] += abs(fit.sag_m - span.sag_m) <= fit.sag_ci95_m
        hits["z_a"] += abs(fit.z_a_m - span.z_a_m) <= fit.z_a_ci95_m
        hits["z_b"] += abs(fit.z_b_m - span.z_b_m) <= fit.z_b_ci95_m
        hits["tilt"] += abs(fit.tilt_rad - span.tilt_rad) <= fit.tilt_ci95_rad
        relative_errors.append(abs(fit.catenary_constant_m / span.catenary_constant_m - 1))
        sag_errors.append(abs(fit.sag_m - span.sag_m))
    fitted = n_spans - failures
    out = {f"coverage_{k}": v / max(fitted, 1) for k, v in hits.items()}
    out.update(failures=failures, fitted=fitted,
               c_error_p95=float(np.percentile(relative_errors, 95)),
               c_error_max=float(np.max(relative_errors)),
               c_within_1pct=float(np.mean(np.array(relative_errors) < 0.01)),
               sag_error_p95_m=float(np.percentile(sag_errors, 95)),
               sag_error_max_m=float(np.max(sag_errors)),
               time_median_ms=1e3 * float(np.median(times)),
               time_max_ms=1e3 * float(np.max(times)))
    return out


if __name__ == "__main__":
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 500
    seed = int(sys.argv[2]) if len(sys.argv) > 2 else 2024
    for key, value in run(n, seed).items():
        print(f"{key:28s} {value:.4f}" if isinstance(value, float) else f"{key:28s} {value}")
