"""The fitted error model on synthetic tiles (workers/uncertainty/model.py)."""

from __future__ import annotations

import numpy as np

from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.uncertainty import accumulate, sample
from demaudit.workers.uncertainty.model import fit_error_model

PIXEL = 5.0
N = 400


def curved_tile(amplitude_m: float, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """A reference of ridges whose curvature grows down the rows (slope and curvature out of
    phase), and dh of spread 0.2 m + 0.4 m x |curvature| (sample.abs_curvature units), white."""
    x = (np.arange(N) + 0.5) * PIXEL
    rows = np.linspace(0.2, 1.0, N)[:, None]
    reference = amplitude_m * rows * np.cos(2 * np.pi * x / 400.0)[None, :]
    curvature = sample.abs_curvature(reference, px=PIXEL, py=PIXEL)
    dh = (0.2 + 0.4 * curvature) * rng.standard_normal((N, N))
    return reference, dh


def test_a_curvature_dependent_spread_is_found_and_standardised_away():
    rng = np.random.default_rng(11)
    acc = accumulate.ErrorModelAccumulator(max_points=40_000)
    for i, amplitude in enumerate((10.0, 25.0, 40.0)):
        reference, dh = curved_tile(amplitude, rng)
        acc.add(
            sample.tile_error_sample(
                dh,
                reference=reference,
                landcover=None,
                classes=(),
                region_masks={},
                pixel_centres=lambda r, c, i=i: ((c + 0.5) * PIXEL + i * N * PIXEL, r * PIXEL),
                crs="EPSG:32632",
                pixel_size_m=(PIXEL, PIXEL),
                tile_id=f"t{i}",
                options=sample.ErrorModelOptions(seed=2, samples_per_tile=10_000),
            )
        )
    model = fit_error_model(acc, max_distance_m=1500.0, seed=0)
    # the generator's 0.2 m + 0.4 m x |curvature| (the slope term stays small: the spread does
    # not depend on slope here)
    assert abs(model.sigma.d - 0.4) < 0.06
    assert abs(model.sigma(0.0, 0.0) - 0.2) < 0.03
    assert model.sigma(30.0, 0.0) - model.sigma(0.0, 0.0) < 0.05
    rows = [r for r in model.curvature_table if r["count"] >= 1000]
    assert len(rows) >= 4
    nmad = np.array([r["nmad"] for r in rows])
    assert np.all(np.diff(nmad) > 0) and nmad[-1] > 2 * nmad[0]
    for r in rows:  # the model averaged over each bin follows the bin's NMAD
        assert abs(r["model_m"] / r["nmad"] - 1) < 0.1
    # standardised by the model, the samples have unit spread in every curvature bin
    pts = acc.samples()
    z = model.standardise(pts[:, 2], pts[:, 3], pts[:, 4])
    key = sample.curvature_key(pts[:, 4])
    for k in np.unique(key):
        if (key == k).sum() >= 500:
            part = z[key == k]
            nmad_z = dh_summary.NMAD_FACTOR * np.median(np.abs(part - np.median(part)))
            assert abs(nmad_z - 1) < 0.1
    doc = model.document()
    assert doc["sigma_by_curvature"]["bins"] == model.curvature_table
    assert doc["sigma_model"]["d_m"] == model.sigma.d
