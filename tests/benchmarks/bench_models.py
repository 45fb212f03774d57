"""Benchmark of the niche-model families (a script, not collected by pytest).

Fit time per family for n = 10 and n = 100 presences against 10,000 background rows x 8
predictors, and prediction throughput (cells/s) on a float32 stack, beside a bare
``X @ w`` over the same stack (the memory-bound limit of any model that reads every
predictor once).  Reports min and median of repeats and writes docs/benchmarks/models.md.

Run: ``python tests/benchmarks/bench_models.py [--quick]``.  Data are invented
(Gaussian predictors); timings depend on the machine.
"""

from __future__ import annotations

import argparse
import platform
from pathlib import Path

import numpy as np

from screener.models import make_model
from _timing import timed  # noqa: E402 (tests/benchmarks/_timing.py)

FAMILIES = {"ellipsoid": {}, "envelope": {}, "ppm": {}, "forest": {}}


def main(quick: bool = False) -> str:
    rng = np.random.default_rng(0)
    p, m = 8, 10_000
    background = rng.normal(size=(m, p))
    centre = rng.normal(scale=0.7, size=p)
    n_cells = 200_000 if quick else 1_000_000
    stack = rng.normal(size=(n_cells, p)).astype(np.float32)
    fit_repeats = 2 if quick else 3
    pred_repeats = 3 if quick else 5

    lines = [
        "# Model benchmarks",
        "",
        f"Machine: {platform.processor() or platform.machine()}, Python "
        f"{platform.python_version()}, numpy {np.__version__}; single process. "
        f"Background {m:,} x {p} predictors (invented Gaussian data); times in seconds "
        f"as min / median of {fit_repeats} fits and {pred_repeats} predictions.",
        "",
        "## Fit time (s)",
        "",
        "| family | n = 10 | n = 100 | ppm: terms, chosen l1_penalty, k |",
        "| --- | --- | --- | --- |",
    ]
    fitted = {}
    for family, params in FAMILIES.items():
        cells = []
        note = ""
        for n in (10, 100):
            pres = centre + rng.normal(scale=0.5, size=(n, p))
            lo, med, _ = timed(
                lambda f=family, kw=params, x=pres: make_model(f, **kw).fit(
                    x, background
                ),
                fit_repeats,
            )
            cells.append(f"{lo:.3f} / {med:.3f}")
            if n == 100:
                fitted[family] = make_model(family, **params).fit(pres, background)
                if family == "ppm":
                    mod = fitted[family]
                    note = (
                        f"{'+'.join(mod.terms_)}, {mod.l1_penalty_:.3g}, "
                        f"{mod.n_coefficients_}"
                    )
        lines.append(f"| {family} | {cells[0]} | {cells[1]} | {note} |")

    w = rng.normal(size=p).astype(np.float32)
    lo_ref, med_ref, _ = timed(lambda: stack @ w, pred_repeats)
    lines += [
        "",
        f"## Prediction throughput ({n_cells:,} float32 cells x {p} predictors, "
        "models fitted with n = 100)",
        "",
        "| what | best (cells/s) | median (cells/s) | best time / `X @ w` best time |",
        "| --- | --- | --- | --- |",
        f"| bare `X @ w` (float32) | {n_cells / lo_ref:.3g} | {n_cells / med_ref:.3g} "
        "| 1.0 |",
    ]
    for family, model in fitted.items():
        X = stack if family != "forest" else stack[: n_cells // 10]
        lo, med, _ = timed(lambda model=model, X=X: model.predict(X), pred_repeats)
        rate_lo, rate_med = len(X) / lo, len(X) / med
        ratio = (n_cells / lo_ref) / rate_lo
        lines.append(
            f"| {family} predict | {rate_lo:.3g} | {rate_med:.3g} | {ratio:.1f} |"
        )
    pres = centre + rng.normal(scale=0.5, size=(100, p))
    ratios = {}
    for fc in ("linear", "linear+quadratic", "linear+quadratic+hinge",
               "linear+quadratic+interaction+hinge+step"):
        mod = make_model("ppm", terms=fc, l1_penalty=0.05).fit(pres, background)
        lo, med, _ = timed(lambda mod=mod: mod.predict(stack), pred_repeats)
        ratios[fc] = lo / lo_ref
        lines.append(
            f"| ppm {fc} (k = {mod.n_coefficients_}) predict | "
            f"{n_cells / lo:.3g} | {n_cells / med:.3g} | {ratios[fc]:.1f} |"
        )
    ppm = fitted["ppm"]
    lo, _, _ = timed(lambda: ppm.predict(stack), pred_repeats)
    ratio = lo / lo_ref
    lines += [
        "",
        f"ppm target: within 3x of `X @ w`. Fitted model ({'+'.join(ppm.terms_)}): "
        f"{ratio:.1f}x ({'met' if ratio <= 3 else 'not met'}); by term sets: "
        + ", ".join(f"{k} {v:.1f}x" for k, v in ratios.items())
        + ". "
        f"Met by: {', '.join(k for k, v in ratios.items() if v <= 3) or 'none'}. "
        "Each quadratic/product term adds a p x p matrix product, and each "
        "hinge/step predictor a pass of comparisons and a gather, over the stack.",
        "",
        "The forest is timed on a tenth of the cells (it is far slower); its rate is "
        "per cell all the same.",
        "",
    ]
    return "\n".join(lines)


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="smaller stack, fewer repeats")
    ap.add_argument(
        "--out",
        default=str(
            Path(__file__).resolve().parents[2] / "docs" / "benchmarks" / "models.md"
        ),
    )
    args = ap.parse_args()
    text = main(quick=args.quick)
    Path(args.out).write_text(text)
    print(text)
