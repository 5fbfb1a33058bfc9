"""Shared parts of the seeded parameter-recovery tests of ``bayesbase calibrate``: what a store's
fit must cover (the simulated truth of each summarised parameter), which intervals cover it, the
tally over replicate stores and the binomial bands the tallies must fall in.

Outside reference: ``scipy.stats.binom`` (the count of credible intervals covering the truth over
independent replicate stores is Binomial(n, level) when the intervals are calibrated).

Used by tests/test_calibrate_recovery.py (the product's default form through ``calibrate()``).
The replicates are mapped over two forked worker processes by ``_map_replicates`` of
tests/test_calibrate_sbc.py (imported, not copied), whose own recovery test (the quadrature form
with sampled locations) keeps the same targets inline.
"""
from __future__ import annotations

from test_calibrate_sbc import _map_replicates

__all__ = ["map_replicates", "recovery_targets", "covered", "tally", "band"]

map_replicates = _map_replicates


def recovery_targets(truth, method: str = "demo analyser B") -> dict:
    """{(parameter, group): simulated truth} of one analyte's
    :class:`bayesbase.calibrate.simulate.Truth`, keyed as ``summary_table`` labels its rows: the
    CVI median, its spread on the ln scale, the bias of ``method`` and every breed centre."""
    want = {("cvi", ""): truth.cvi_median, ("cvi_log_sd", ""): truth.cvi_log_sd,
            ("method_bias", method): truth.method_bias}
    want.update({("breed_center", b): truth.breed_center(b) for b in truth.breed_log_offsets})
    return want


def covered(table, want: dict) -> list[tuple[tuple[str, str], bool]]:
    """[(key, lower <= truth <= upper)] for each target, read from a summary table's rows."""
    t = table.set_index(["parameter", "group"])
    return [(key, bool(t.loc[key, "lower"] <= value <= t.loc[key, "upper"])) for key, value in want.items()]


def tally(per_store) -> dict:
    """{key: [covered in store 0, store 1, ...]} from each store's :func:`covered` list."""
    hits: dict = {}
    for covers in per_store:
        for key, hit in covers:
            hits.setdefault(key, []).append(hit)
    return hits


def band(n: int, level: float, prob: float) -> tuple[int, int]:
    """The central ``prob`` band of Binomial(n, level) (scipy.stats.binom.interval): where the
    number of covering intervals out of n independent ones falls with probability >= ``prob``
    when the intervals cover at their nominal ``level``."""
    from scipy import stats

    lo, hi = stats.binom.interval(prob, n, level)
    return int(lo), int(hi)
