"""The compiled exact engine's per-design constants (:func:`bayesbase.model._jit._case_design`:
one table slot per (CVI, uncertainty, sG, baseline variance, number of baselines, new-result
variance, tau), shared by every case of that design) and its per-case node range for the scores.

Checks: the scores of cases from many interleaved designs (more designs than table slots, so
slots are reused and overwritten) against a plain per-case reference built from scipy
(scipy.stats.multivariate_normal for the baselines' joint normal marginal per node, the
normal-normal posterior of McIntosh & Urban, Biostatistics 2003;4:27-40, scipy.special.logsumexp
and scipy.stats.norm for the predictive mixtures); and each case's outputs bit-identical whether
scored alone or inside the shuffled batch (a stale slot would change them).
"""
import numpy as np
import pytest
from scipy import optimize, special, stats

from bayesbase.model import normal
from bayesbase.model.engine import CaseArrays, exact_assess

pytest.importorskip("numba")

NODES = 24


def _designs(n, seed):
    """Invented cases: 100 designs (CVI, its log-SD 0 to 1, sG, sA, replicates, tau, new-result
    replicates; each from a few values, so many designs differ in one field only), each
    repeated, shuffled; 0 to 4 baselines; a fifth with unequal replicates."""
    rng = np.random.default_rng(seed)
    nd = 100
    pick = rng.integers(0, nd, n)
    cvi = rng.choice([0.05, 0.1, 0.3], nd)[pick]
    cs = rng.choice([0.0, 0.1, 0.3, 0.6, 1.0], nd)[pick]
    sg = rng.choice([0.1, 0.25, 0.5], nd)[pick]
    sa = rng.choice([0.0, 0.02, 0.1], nd)[pick]
    tau = rng.choice([0.1, 0.27, 0.5], nd)[pick]
    new_r = rng.choice([1.0, 2.0], nd)[pick]
    nb = rng.integers(0, 5, nd)[pick]
    mu = np.log(90.0)
    j = 4
    base = mu + rng.normal(0.0, 0.3, (n, j))
    used = np.arange(j)[None, :] < nb[:, None]
    base[~used] = np.nan
    r = np.where(used, 1.0, 0.0)
    uneq = rng.random(n) < 0.2
    r[uneq] = np.where(used[uneq], rng.choice([1.0, 3.0], (uneq.sum(), j)), 0.0)
    new = mu + rng.choice([0.0, 0.2, 1.0, -3.0], n) + rng.normal(0.0, 0.1, n)
    return CaseArrays(
        prior_mean=np.full(n, mu), sg=sg, cvi=cvi, cvi_log_sd=cs, sa=sa, base_y=base, base_r=r,
        base_extra_var=np.zeros((n, j)), base_censor=np.zeros((n, j)), new_y=new, new_r=new_r,
        new_extra_var=np.zeros(n), new_censor=np.zeros(n), tau=tau,
        delta=np.where(rng.random(n) < 0.5, 0.1, np.nan), prior_change=np.full(n, 0.1),
    )


def _reference_scores(c, i, nodes=NODES):
    """percentile, log_bf10, p_increase, p_exceed_delta of case i the plain way (scipy)."""
    x, wn = np.polynomial.hermite_e.hermegauss(nodes)
    si2 = np.log1p((c.cvi[i] * np.exp(c.cvi_log_sd[i] * x)) ** 2)
    used = c.base_r[i] > 0
    y, r, mu, sg2 = c.base_y[i][used], c.base_r[i][used], c.prior_mean[i], c.sg[i] ** 2
    lw, m, pv = np.log(wn / wn.sum()), np.zeros(nodes), np.zeros(nodes)
    for k in range(nodes):
        v = si2[k] + c.sa[i] ** 2 / r
        if y.size:
            lw[k] += stats.multivariate_normal(np.full(y.size, mu), np.diag(v) + sg2).logpdf(y)
        prec = 1.0 / sg2 + np.sum(1.0 / v)
        pv[k] = 1.0 / prec
        m[k] = pv[k] * (mu / sg2 + np.sum(y / v))
    lw -= special.logsumexp(lw)
    nv = pv + si2 + c.sa[i] ** 2 / c.new_r[i]
    tau2 = c.tau[i] ** 2
    ys = c.new_y[i]
    pct = np.sum(np.exp(lw) * stats.norm.cdf(ys, m, np.sqrt(nv)))
    l0 = lw + stats.norm.logpdf(ys, m, np.sqrt(nv))
    l1 = lw + stats.norm.logpdf(ys, m, np.sqrt(nv + tau2))
    lbf = special.logsumexp(l1) - special.logsumexp(l0)
    w1 = np.exp(l1 - special.logsumexp(l1))
    dm = tau2 / (nv + tau2) * (ys - m)
    dsd = np.sqrt(tau2 * nv / (nv + tau2))
    pinc = np.sum(w1 * stats.norm.cdf(dm / dsd))
    dl = c.delta[i]
    tail = np.sum(w1 * (stats.norm.cdf((dm - dl) / dsd) + stats.norm.cdf((-dl - dm) / dsd)))
    pc = special.expit(special.logit(c.prior_change[i]) + lbf)
    return pct, lbf, pinc, pc * tail if np.isfinite(dl) else np.nan


def test_scores_of_interleaved_designs_match_scipy_reference():
    """Scores of 400 cases from 100 shuffled designs (the table has 64 slots) against the
    per-case scipy reference: probabilities to 1e-9, log Bayes factor to 1e-9 relative."""
    assert normal.prepare(10**9)
    c = _designs(400, seed=3)
    got = exact_assess(c, intervals=False, nodes=NODES)
    for i in range(0, 400, 3):
        pct, lbf, pinc, pex = _reference_scores(c, i)
        assert got["percentile"][i] == pytest.approx(pct, abs=1e-9)
        assert got["log_bf10"][i] == pytest.approx(lbf, rel=1e-9, abs=1e-9)
        assert got["p_increase"][i] == pytest.approx(pinc, abs=1e-9)
        if np.isfinite(pex):
            assert got["p_exceed_delta"][i] == pytest.approx(pex, abs=1e-9)
        else:
            assert np.isnan(got["p_exceed_delta"][i])


def test_a_case_scores_the_same_alone_as_in_a_shuffled_batch():
    """Every output of a case is bit-identical scored alone (fresh table) and inside a batch of
    other designs (reused and overwritten slots): the table only ever holds its key's values."""
    assert normal.prepare(10**9)
    c = _designs(300, seed=8)
    batch = exact_assess(c, nodes=NODES)
    for i in range(0, 300, 7):
        alone = exact_assess(c.subset(slice(i, i + 1)), nodes=NODES)
        for key, v in alone.items():
            np.testing.assert_array_equal(v, batch[key][i:i + 1], err_msg=key)


_FIELDS = ("cvi", "cvi_log_sd", "sg", "base_extra_var", "n_baseline", "new_extra_var", "tau")


def _pair_case(field, value, shared):
    """One invented case of the design (CVI 0.1 or ``shared`` where the field is CVI itself)
    with ``field`` set to ``value``; three baselines unless the field is their number."""
    d = dict(cvi=shared, cvi_log_sd=0.3, sg=0.25, base_extra_var=0.0, n_baseline=3,
             new_extra_var=0.0, tau=0.27)
    if field == "cvi":
        d["sg"] = shared
    d[field] = value
    nb = d.pop("n_baseline")
    extra = d.pop("base_extra_var")
    base = [np.log(90.0) + v for v in (0.05, -0.1, 0.2, 0.0)[:nb]]
    return CaseArrays.from_lists(
        [base], prior_mean=np.log(90.0), sa=0.03, new_y=np.log(90.0) + 0.3, prior_change=0.1,
        base_extra_var=np.full((1, max(nb, 1)), extra), **d)


def _slot(c):
    """The design-table slot of the single case ``c`` (the kernel's own slot function)."""
    from bayesbase.model import _jit

    ev0 = c.sa[0] ** 2 + c.base_extra_var[0, 0] if c.mask[0].any() else 0.0
    evn = c.sa[0] ** 2 + c.new_extra_var[0]
    return _jit._design_key(c.cvi[0], c.cvi_log_sd[0], c.sg[0], ev0, int(c.mask[0].sum()), evn,
                            c.tau[0], np.full((_jit._DCACHE + 1, 7), np.nan))[0]


@pytest.mark.parametrize("field, a, b", [
    ("cvi", 0.1, 0.12), ("cvi_log_sd", 0.3, 0.5), ("sg", 0.25, 0.3), ("base_extra_var", 0.0, 0.01),
    ("new_extra_var", 0.0, 0.01), ("tau", 0.27, 0.4)])
def test_two_designs_in_one_slot_differing_in_one_field(field, a, b):
    """Two designs that differ in one field of the key only and share a table slot (the second
    value searched upwards from ``b`` until the kernel's slot function gives the first's slot),
    scored alternately: each case's outputs are bit-identical to its own alone, and the two
    designs' outputs differ. (Designs differing only in their number of baselines, 0 to 4, never
    share a slot: checked below.)"""
    assert normal.prepare(10**9)
    ca = _pair_case(field, a, 0.1)
    for v in np.linspace(b, 1.5 * b, 4001):
        cb = _pair_case(field, v, 0.1)
        if _slot(cb) == _slot(ca):
            break
    else:
        pytest.fail("no two designs sharing a slot found")
    both = CaseArrays(**{f: np.concatenate([getattr(ca, f), getattr(cb, f)] * 3)
                         for f in ca.__dataclass_fields__})
    got = exact_assess(both, nodes=NODES)
    alone = [exact_assess(c, nodes=NODES) for c in (ca, cb)]
    for key in got:
        for i in range(6):
            np.testing.assert_array_equal(got[key][i], alone[i % 2][key][0], err_msg=key)
    assert alone[0]["log_bf10"][0] != alone[1]["log_bf10"][0]


def test_designs_differing_in_number_of_baselines_never_share_a_slot():
    """0 to 4 baselines of one design: five distinct slots (over 50 designs)."""
    assert normal.prepare(10**9)
    for shared in np.linspace(0.05, 0.3, 50):
        slots = {_slot(_pair_case("n_baseline", nb, shared)) for nb in range(5)}
        assert len(slots) == 5


# ----------------------------------------------------------------- scratch memory never read unwritten
def _brentq(q, w, m, s):
    # reference: scipy.optimize.brentq on the mixture CDF built from scipy.stats.norm.cdf
    lo, hi = np.min(m - 40 * s), np.max(m + 40 * s)
    return optimize.brentq(lambda x: np.sum(w * stats.norm.cdf(x, m, s)) - q, lo, hi,
                           xtol=1e-15, rtol=1e-15)


def _reference_quantiles(c, i, nodes, levels):
    """The four quantiles of case i the plain way: per node the baselines' joint normal marginal
    (scipy.stats.multivariate_normal), the normal-normal posterior (McIntosh & Urban 2003), the
    predictive mixture's CDF from scipy.stats.norm and its root by scipy.optimize.brentq."""
    x, wn = np.polynomial.hermite_e.hermegauss(nodes)
    si2 = np.log1p((c.cvi[i] * np.exp(c.cvi_log_sd[i] * x)) ** 2)
    used = c.base_r[i] > 0
    y, mu, sg2 = c.base_y[i][used], c.prior_mean[i], c.sg[i] ** 2
    lw, m, pv = np.log(wn / wn.sum()), np.zeros(nodes), np.zeros(nodes)
    for k in range(nodes):
        v = si2[k] + c.sa[i] ** 2 / c.base_r[i][used]
        if y.size:
            lw[k] += stats.multivariate_normal(np.full(y.size, mu), np.diag(v) + sg2).logpdf(y)
        pv[k] = 1.0 / (1.0 / sg2 + np.sum(1.0 / v))
        m[k] = pv[k] * (mu / sg2 + np.sum(y / v))
    w = np.exp(lw - special.logsumexp(lw))
    nv = pv + si2 + c.sa[i] ** 2 / c.new_r[i]
    sds = (np.sqrt(pv), np.sqrt(pv), np.sqrt(nv), np.sqrt(nv))
    return [_brentq(q, w, m, s) for q, s in zip(levels, sds)], float(np.max(np.sqrt(nv)))


def _hard_designs(n, seed):
    """:func:`_designs` plus what the scratch must survive: new values missing (NaN) or extreme
    (+-30 on the log scale, so both predictive densities underflow and the log-sum-exp path
    runs)."""
    c = _designs(n, seed)
    rng = np.random.default_rng(seed + 1)
    pick = rng.random(n)
    c.new_y[pick < 0.08] = np.nan
    c.new_y[(pick >= 0.08) & (pick < 0.14)] += 30.0
    c.new_y[(pick >= 0.14) & (pick < 0.2)] -= 30.0
    return c


@pytest.fixture
def filled_scratch(monkeypatch):
    """Make every scratch array the compiled kernel takes (the (CVI, uncertainty) table, the
    design table with its keys, the per-node rows, the accumulators) start full of ``value``
    instead of whatever memory np.empty returns; yields a setter for ``value``."""
    from bayesbase.model import _jit

    original = _jit.engine_scratch
    state = {"value": np.nan}

    def filled(nodes):
        arrays = original(nodes)
        for a in arrays:
            a.fill(state["value"])
        return arrays

    monkeypatch.setattr(_jit, "engine_scratch", filled)
    return lambda v: state.__setitem__("value", v)


@pytest.mark.parametrize("nodes", [20, 24, 13])
@pytest.mark.parametrize("prune", [1e-13, 0.0])
def test_outputs_do_not_depend_on_scratch_contents(filled_scratch, nodes, prune):
    """Every output of 300 cases (100 designs, more than the table's 64 slots; 0 to 4 baselines,
    unequal replicates, CVI uncertainty 0, missing and extreme new values) is bit-identical
    whether the kernel's scratch starts as np.empty's memory, all NaN or all 1e300, at node
    counts that are and are not a multiple of the quantile solve's padding. NaN-filled scratch
    made 4,999 of 5,000 percentiles NaN at 20 nodes in the reverted first version of the table."""
    assert normal.prepare(10**9)
    c = _hard_designs(300, seed=21)
    plain = exact_assess(c, nodes=nodes, prune=prune)
    assert np.isfinite(plain["pi_upper"]).all() and np.isfinite(plain["theta_lower"]).all()
    has_y = np.isfinite(c.new_y)
    assert np.isfinite(plain["percentile"][has_y]).all()
    assert np.isnan(plain["percentile"][~has_y]).all()
    for value in (np.nan, 1e300, -1e300, 0.0):
        filled_scratch(value)
        got = exact_assess(c, nodes=nodes, prune=prune)
        for key, v in plain.items():
            np.testing.assert_array_equal(got[key], v, err_msg=f"{key} fill {value}")


def test_filled_scratch_scores_and_quantiles_match_scipy(filled_scratch):
    """With the scratch all NaN, at 20 nodes: scores against the per-case scipy reference
    (probabilities 1e-9, log Bayes factor 1e-9 relative) and the four quantiles against brentq
    on the mixture CDF (1e-10 x max(1, largest predictive SD), no pruning), over the hard
    designs."""
    assert normal.prepare(10**9)
    nodes = 20
    filled_scratch(np.nan)
    c = _hard_designs(240, seed=5)
    got = exact_assess(c, nodes=nodes, prune=0.0)
    a, b = 0.025, 0.025  # the engine's defaults: 95 % credible interval and 95 % coverage
    keys = ("theta_lower", "theta_upper", "pi_lower", "pi_upper")
    for i in range(0, 240, 2):
        if np.isfinite(c.new_y[i]):
            pct, lbf, pinc, pex = _reference_scores(c, i, nodes)
            assert got["percentile"][i] == pytest.approx(pct, abs=1e-9)
            assert got["log_bf10"][i] == pytest.approx(lbf, rel=1e-9, abs=1e-9)
            assert got["p_increase"][i] == pytest.approx(pinc, abs=1e-9)
            if np.isfinite(pex):
                assert got["p_exceed_delta"][i] == pytest.approx(pex, abs=1e-9)
        else:
            for key in ("percentile", "log_bf10", "p_change", "p_increase", "p_exceed_delta"):
                assert np.isnan(got[key][i]), key
        ref, smax = _reference_quantiles(c, i, nodes, (a, 1 - a, b, 1 - b))
        for key, val in zip(keys, ref):
            assert abs(got[key][i] - val) <= 1e-10 * max(1.0, smax), (key, i, got[key][i] - val)


def test_filled_scratch_over_two_threads(filled_scratch):
    """Two threads of one process, each with its own NaN-filled scratch: outputs bit-identical
    to one thread with np.empty's scratch (4,400 cases, 20 nodes)."""
    assert normal.prepare(10**9)
    c = _hard_designs(4_400, seed=9)
    plain = exact_assess(c, nodes=20)
    filled_scratch(np.nan)
    got = exact_assess(c, nodes=20, threads=2)
    for key, v in plain.items():
        np.testing.assert_array_equal(got[key], v, err_msg=key)
