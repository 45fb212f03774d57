"""Fitted models over the grid: block-by-block prediction and refit-and-map tasks.

:func:`predict_map` turns a fitted :class:`~screener.models.base.NicheModel` into a
suitability map (float32, NaN off the valid mask), block by block, in this process or
window by window on an executor's workers for stacks streamed from disk;
:func:`outside_map` marks the cells beyond a model's calibration range the same way.
:class:`GeographicRefit` refits a family to other record cells and maps it (the task
of the geographic-space overlap tests); :func:`refit_seconds` estimates what one
such refit costs, from the family and the grid's size alone, and
:func:`geographic_refit` builds a pair's refit from the settings when they ask for it.
"""

from __future__ import annotations

import functools

import numpy as np

from screener.layers import LayerStack
from screener.models import accepts_random_state, family_params, make_model

__all__ = ["predict_map", "outside_map", "GeographicRefit", "geographic_refit",
           "geographic_test_cost",
           "refit_seconds", "REFIT_COST", "GEOGRAPHIC_TEST_BUDGET_S"]

#: Cost of one refit-and-map of each family on the reference machine (2 cores, the
#: demo's four layers, 5,000 background cells, 20 records): seconds to fit, and
#: seconds per valid cell mapped.  Measured by timing :class:`GeographicRefit` on
#: 20,000 and 80,000 cells (fastest of three; see docs/benchmarks/models.md).  The
#: figures are fixed so that ``[overlap] geographic_tests = "auto"`` makes the same
#: choice on every machine and every run, whatever the machine's load.
REFIT_COST: dict[str, tuple[float, float]] = {
    "ellipsoid": (0.0005, 1.2e-7),
    "envelope": (0.001, 1.3e-7),
    "ppm": (0.007, 1.8e-6),
    "forest": (1.6, 4.0e-5),
}

#: blocks at least this valid are predicted whole and masked afterwards (for families
#: that accept invalid rows): cheaper than gathering the valid cells of a block
_PREDICT_WHOLE_BLOCK = 0.5


def _blocks_for(model, stack: LayerStack, max_cells: int, rows=None):
    """Blocks of ``stack`` with each block's predictions, float32 of the block's shape
    (NaN where invalid)."""
    whole = getattr(model, "accepts_invalid_rows", False)
    for sl, X, valid in stack.iter_blocks(max_cells, rows=rows, gather=not whole):
        if whole:
            if valid.mean() >= _PREDICT_WHOLE_BLOCK:
                pred = model.predict(X, check_input=False, dtype=np.float32)
                pred = pred.reshape(valid.shape)
                pred[~valid] = np.nan
                yield sl, pred
                continue
            X = np.take(X, np.flatnonzero(valid.ravel()), axis=0)
        block = np.full(valid.shape, np.nan, dtype=np.float32)
        if X.shape[0]:
            block[valid] = model.predict(X, dtype=np.float32)
        yield sl, block


def _predict_rows(model, stack: LayerStack, rows: tuple, max_cells: int):
    """Predictions for the valid cells of a band of rows (a task for an executor)."""
    r0, r1 = rows
    sub = stack.grid.mask[r0:r1]
    out = [block[stack.grid.mask[sl]]
           for sl, block in _blocks_for(model, stack, max_cells, rows=slice(r0, r1))]
    return np.concatenate(out) if out else np.empty(int(sub.sum()), np.float32)


def predict_map(model, stack: LayerStack, *, max_cells: int = 1 << 20,
                map_fn=None) -> np.ndarray:
    """Predict a fitted model over the grid block by block (float32, NaN off-mask).

    Parameters
    ----------
    model : NicheModel
        Fitted.
    stack : LayerStack
        Predictors in the order the model was fitted with.
    max_cells : int, default 1048576
        Cells per block (memory per block is about ``max_cells * n_layers * 4`` bytes).
    map_fn : callable, optional
        ``map``-like callable of a parallel executor.  Used for stacks streamed from
        disk, where each worker reads its own windows; in-memory stacks are predicted
        in this process (sending their blocks to workers would cost more than it saves).
    """
    grid = stack.grid
    out = np.full(grid.shape, np.nan, dtype=np.float32)
    if map_fn is not None and stack.streamed:
        bands = stack.row_bands(max_cells)
        task = functools.partial(_predict_rows, model, stack, max_cells=max_cells)
        for (r0, r1), values in zip(bands, map_fn(task, bands)):
            block = out[r0:r1]
            block[grid.mask[r0:r1]] = values
        return out
    for sl, block in _blocks_for(model, stack, max_cells):
        out[sl] = block
    return out


def _outside_rows(stack: LayerStack, clamp, rows: tuple, max_cells: int):
    """1.0 where any predictor lies outside ``clamp``'s range, at the valid cells of a
    band of rows (a task)."""
    parts = [clamp.outside(X) for _, X, _ in
             stack.iter_blocks(max_cells, rows=slice(*rows)) if X.shape[0]]
    return (np.concatenate(parts) if parts else np.empty(0, bool)).astype(np.float32)


def outside_map(stack: LayerStack, clamp, max_cells: int = 1 << 20, map_fn=None):
    """Map (float32, NaN off-mask) of cells beyond a model's calibration range: 1 where
    the mapped prediction was clamped (or extrapolated, with clamping off), else 0."""
    grid = stack.grid
    out = np.full(grid.shape, np.nan, dtype=np.float32)
    run = map_fn if map_fn is not None and stack.streamed else map
    bands = stack.row_bands(max_cells)
    task = functools.partial(_outside_rows, stack, clamp, max_cells=max_cells)
    for (r0, r1), values in zip(bands, run(task, bands)):
        out[r0:r1][grid.mask[r0:r1]] = values
    return out


def refit_seconds(family: str, n_cells: int) -> float:
    """Estimated seconds for one refit of ``family`` mapped over ``n_cells`` cells.

    A fixed cost model (:data:`REFIT_COST`), not a timing: the estimate, and every
    choice made from it, is the same on every machine and does not depend on load.
    A family missing from the table is costed as the dearest one.

    Examples
    --------
    >>> round(refit_seconds("ellipsoid", 1_000_000), 2)
    0.12
    """
    fit, per_cell = REFIT_COST.get(family, max(REFIT_COST.values()))
    return fit + per_cell * int(n_cells)


class GeographicRefit:
    """Refit a model family to a set of record cells and map it (picklable).

    Used by the geographic-space tests: ``self(cells)`` fits the family to the
    predictor values at the flat cell indices ``cells`` against the pooled background
    of the pair and returns the suitability map (float32, NaN off the mask).
    """

    def __init__(self, family, params, background, stack_values, mask):
        self.family = family
        self.params = params
        self.background = background
        self.stack_values = stack_values
        self.mask = mask
        pos = np.full(mask.size, -1, dtype=np.int64)
        pos[np.flatnonzero(mask.ravel())] = np.arange(int(mask.sum()))
        self.pos = pos

    def __call__(self, cells):
        rows = self.pos[np.asarray(cells, dtype=np.int64)]
        model = make_model(self.family, **self.params).fit(
            self.stack_values[rows].astype(np.float64), self.background
        )
        out = np.full(self.mask.shape, np.nan, dtype=np.float32)
        out[self.mask] = model.predict(self.stack_values).astype(np.float32)
        return out


#: ``[overlap] geographic_tests = "auto"`` runs the geographic-space tests of a pair
#: when their estimated time (:func:`refit_seconds` x maps) is at most this, in seconds
GEOGRAPHIC_TEST_BUDGET_S = 120.0


def geographic_test_cost(settings, n_cells: int, *,
                         streamed: bool = False) -> tuple[float, str]:
    """Estimated serial seconds of one pair's geographic-space tests, as the settings
    ask for them, and why ``"auto"`` skips them.

    Equivalency maps two refits per replicate and each similarity test one more:
    4 x ``n_replicates`` x :func:`refit_seconds` of the first family over
    ``n_cells`` valid cells (a fixed cost model, so every choice made from it is the
    same on every machine).

    Returns
    -------
    seconds : float
        0 when the tests will not run.
    reason : str
        Why ``geographic_tests = "auto"`` skipped them (streamed layers, or more than
        :data:`GEOGRAPHIC_TEST_BUDGET_S`); "" when they run or are off.
    """
    mode = settings.overlap.geographic_tests
    if mode == "off" or settings.overlap.n_replicates <= 0:
        return 0.0, ""
    if streamed and mode == "auto":
        return 0.0, (
            "geographic-space tests skipped: the grid is streamed from disk and each "
            "replicate would map it four times. Set [overlap] geographic_tests = \"on\" "
            "to run them.")
    family = settings.models.families[0]
    n_maps = 4 * settings.overlap.n_replicates
    estimate = refit_seconds(family, n_cells) * n_maps
    if mode == "auto" and estimate > GEOGRAPHIC_TEST_BUDGET_S:
        return 0.0, (
            f"geographic-space tests would take about {estimate / 60:.0f} min "
            f"(refitting {family} {n_maps} times over {int(n_cells):,} cells); skipped. "
            "Set [overlap] geographic_tests = \"on\" to run them.")
    return estimate, ""


def geographic_refit(settings, stack: LayerStack, background_a, background_b, *,
                     seed: int) -> tuple[GeographicRefit | None, str]:
    """The refit of one pair's geographic-space tests, as the settings ask for it.

    The first family of ``[models] families`` is refitted, with its ``[models.<family>]``
    parameters, against the pooled background of the pair.  ``[overlap]
    geographic_tests = "auto"`` skips the tests when the layers are streamed from disk
    or when :func:`refit_seconds` estimates more than
    :data:`GEOGRAPHIC_TEST_BUDGET_S` for them (a fixed cost model, so the choice is
    the same on every machine).

    Parameters
    ----------
    settings : screener.project.Settings
    stack : LayerStack
        The predictor layers of the run.
    background_a, background_b : ndarray of shape (n, n_layers)
        Each taxon's background in environmental space.
    seed : int
        Seed of the refitted family, where it takes one.

    Returns
    -------
    refit : GeographicRefit or None
        None when the tests are off or skipped.
    reason : str
        Why "auto" skipped them, for the progress line; "" otherwise.
    """
    seconds, skipped = geographic_test_cost(settings, int(stack.grid.mask.sum()),
                                            streamed=stack.streamed)
    if not seconds:
        return None, skipped
    family = settings.models.families[0]
    params = family_params(settings, family)
    if accepts_random_state(family):
        params["random_state"] = seed
    background = np.vstack([background_a, background_b])
    return GeographicRefit(family, params, background, stack.valid_matrix(),
                           stack.grid.mask), ""
