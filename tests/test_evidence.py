"""The evidence cards: Clark-Evans against its published lattice value, support and
limits on a synthetic run."""

import math

import numpy as np
import pytest
from _synthetic_run import make_run
from pyproj import Geod

from screener.evidence import clark_evans, site_taxa, taxon_evidence


def test_clark_evans_square_lattice_is_two():
    # Clark & Evans (1954): a square lattice of spacing a has R = 2 when the area is
    # n a^2 (mean nearest-neighbour distance a, expected 0.5 a).
    a_km = 2.0
    k = 7
    dlon = a_km / 111.320  # WGS84 degree lengths at the equator (from memory)
    dlat = a_km / 110.574
    lon, lat = np.meshgrid(30 + dlon * np.arange(k), dlat * np.arange(k))
    lon, lat = lon.ravel(), lat.ravel()
    n = lon.size
    # the mean nearest-neighbour distance by pyproj's geodesic, as the reference
    g = Geod(ellps="WGS84")
    nn = []
    for i in range(n):
        _, _, d = g.inv(np.full(n, lon[i]), np.full(n, lat[i]), lon, lat)
        d[i] = np.inf
        nn.append(d.min() / 1000)
    ce = clark_evans(lon, lat, n * a_km**2)
    assert ce.mean_nn_km == pytest.approx(np.mean(nn), rel=1e-9)
    assert ce.ratio == pytest.approx(2.0, abs=2e-3)
    # z = (r_A - r_E) / (0.26136 / sqrt(n * density)), Clark & Evans (1954)
    se = 0.26136 / math.sqrt(n * n / (n * a_km**2))
    assert ce.z == pytest.approx((ce.mean_nn_km - ce.expected_km) / se, rel=1e-12)
    assert ce.p_clustered > 0.99
    assert clark_evans(lon[:2], lat[:2], 10.0) is None


def test_clustered_records_are_a_limit():
    # all records packed in one corner of a large area
    rng = np.random.default_rng(0)
    lon = 36 + rng.uniform(0, 0.01, 12)
    lat = -2 + rng.uniform(0, 0.01, 12)
    ce = clark_evans(lon, lat, 5000.0)
    assert ce.ratio < 0.3 and ce.p_clustered < 1e-6


def test_taxon_evidence_on_a_synthetic_run():
    run = make_run()
    owners = site_taxa(run)
    assert set(owners) == set(run.sites["site_id"])
    for name in run.taxa:
        ev = taxon_evidence(run, name)
        assert ev.n_records == run.taxa[name].records.n
        assert [h["family"] for h in ev.held_out] == ["envelope"]
        assert ev.threshold == run.taxa[name].thresholds["mtp"].value
        assert any("Few records" in x for x in ev.limits)
        assert ev.site_ids == [s for s, t in owners.items() if t == name]
        # the fixture's MESS is negative in the east: part of the range is novel
        s = run.taxa[name].suitability
        m = run.taxa[name].mess
        suitable = np.isfinite(s) & (s >= ev.threshold)
        assert ev.novel_share == pytest.approx(np.mean(m[suitable] < 0))
        # no test was run in the fixture: neither supported nor refuted by one
        assert ev.beats_chance is None and ev.supported == "weakly supported"


def test_better_than_chance_survives_holms_correction_over_the_taxons_p_values():
    # Two families, each with a null-model and a jackknife p: four p-values. One small
    # p among four is what chance gives one time in about six at 0.05; the card claims
    # support only when k x the smallest p (Holm's first step; Holm 1979, Scand. J.
    # Stat. 6:65) is at most 0.05.
    import dataclasses

    run = make_run()
    name = next(iter(run.taxa))

    def card(null_ps, jack_ps):
        rows = [{"algorithm": f, "method": "jackknife", "auc": 0.9, "omission_mtp": 0.0,
                 "auc_null_p": pn, "jackknife_p": pj}
                for f, pn, pj in zip(("ellipsoid", "envelope"), null_ps, jack_ps)]
        tr = dataclasses.replace(run.taxa[name], evaluation=rows)
        return taxon_evidence(dataclasses.replace(run, taxa={**run.taxa, name: tr}), name)

    ev = card((0.03, 0.4), (0.5, 0.6))  # 4 x 0.03 = 0.12
    assert ev.beats_chance is False and ev.supported == "not shown to be better than chance"
    ev = card((0.01, 0.4), (0.5, 0.6))  # 4 x 0.01 = 0.04
    assert ev.beats_chance is True and ev.supported == "supported"
    ev = card((0.01, float("nan")), (float("nan"), float("nan")))  # one test run
    assert ev.beats_chance is True
