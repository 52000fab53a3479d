"""The merged statistics do not depend on the order tiles arrive in, nor on a re-check's resume."""

from __future__ import annotations

import numpy as np
import pytest

from demaudit.workers.stats.merge import JobAccumulator, TileExtremes, keyed_summaries
from demaudit.workers.stats.summary import merge_all, statistics, summarise
from demaudit.workers.tile.task import ALL, OK, TileResult
from tests.support.merging import accumulate

TILES = 240


def tile_result(tile_id: str, rng: np.random.Generator, shift: float = 0.0) -> TileResult:
    """A tile of 50-400 pixels whose mean differs from tile to tile, with two regions and two
    slope strata covering parts of it."""
    dh = rng.normal(rng.uniform(-2, 2) + shift, rng.uniform(0.05, 3.0), rng.integers(50, 400))
    half = dh.size // 2
    regions = {"EAST": summarise(dh[:half])}
    if rng.random() < 0.5:
        regions["WEST"] = summarise(dh[half:])
    strata = {
        ALL: {"slope:0": summarise(dh[::2]), "slope:15": summarise(dh[1::2])},
        "EAST": {"slope:0": summarise(dh[:half:2])},
    }
    return TileResult(tile_id, OK, None, summarise(dh), regions, strata)


@pytest.fixture(scope="module")
def results() -> list[TileResult]:
    rng = np.random.default_rng(17)
    return [tile_result(f"t{i:04d}", rng) for i in range(TILES)]


def fingerprint(acc: JobAccumulator) -> dict:
    """Every key's moments and statistics, exactly (no tolerance)."""
    out = {}
    for key, s in sorted(acc.totals().items()):
        out[key] = (s.count, s.mean.hex(), s.m2.hex(), s.minimum, s.maximum, statistics(s))
    return out


def test_every_arrival_order_gives_the_same_bits(results):
    rng = np.random.default_rng(5)
    orders = [rng.permutation(TILES) for _ in range(6)]
    # the plain running merge (Chan's formula in arrival order) does differ in the last bits
    # for these orders: the case this guards against
    chan = {merge_all([results[i].summary for i in order]).mean.hex() for order in orders}
    assert len(chan) > 1
    want = fingerprint(accumulate(results))
    for order in orders:
        assert fingerprint(accumulate([results[i] for i in order])) == want


def test_the_moments_agree_with_numpy_on_all_pixels():
    rng = np.random.default_rng(3)
    chunks = [rng.normal(rng.uniform(-50, 50), rng.uniform(0.1, 5), 300) for _ in range(40)]
    acc = accumulate([TileResult(f"t{i}", OK, None, summarise(c)) for i, c in enumerate(chunks)])
    every = np.concatenate(chunks)
    s = acc.overall
    assert s.count == every.size
    # numpy on the same pixels is the reference (../shared/CHECK_VALUES.md)
    assert s.mean == pytest.approx(every.mean(), rel=1e-13, abs=1e-13)
    assert s.m2 == pytest.approx(((every - every.mean()) ** 2).sum(), rel=1e-12)


def test_a_resumed_recheck_gives_the_bits_of_a_fresh_run(results):
    rng = np.random.default_rng(11)
    base = accumulate(results)
    table = base.extremes().to_arrays()
    stored = TileExtremes.from_arrays(
        table["tiles"],
        table["keys"],
        table["tile"],
        table["key"],
        table["values"],  # type: ignore[arg-type]
    )
    night = JobAccumulator.resume(base.totals(), stored, excluded=base.excluded)
    changed = sorted(rng.choice(TILES, 30, replace=False))
    replaced = {i: tile_result(results[i].tile_id, rng, shift=0.4) for i in changed}
    for i in rng.permutation(changed):
        night.remove(results[i].tile_id, keyed_summaries(results[i]), excluded=0)
    for i in rng.permutation(changed):
        night.add(replaced[i])
    fresh = accumulate([replaced.get(i, r) for i, r in enumerate(results)][::-1])
    assert fingerprint(night) == fingerprint(fresh)


def test_a_stored_table_without_moments_is_refused():
    with pytest.raises(ValueError, match="no moments"):
        TileExtremes.from_arrays(
            ["t0"],
            [(ALL, "")],
            np.array([0]),
            np.array([0]),
            np.array([[0.0, 1.0]]),
        )
