"""The calibration model fitted one analyte at a time (exact: the posterior factorises).

No parameter of :mod:`bayesbase.calibrate.model` is shared by two analytes: every parameter
carries the ``analyte`` dim (mu, sigma_g, the CVI layer, breed_sd and the breed centres,
method_sd and the method biases, sigma_a, the age slope) or belongs to one cell, and breed
levels are shared as labels only. The joint density is the product of one density per analyte,
so the joint posterior is the product of the analytes' posteriors, and sampling each analyte
alone samples the same posterior (chain c of every analyte together is a draw of the joint).

Each analyte's part keeps every breed level of the store (:attr:`CalibrationData.breed_levels`:
an analyte with no result of a breed carries that breed's centre from the prior, as in the joint
graph) and one graph serves every analyte of the same structure (replicates or not, age term or
not): its data containers (:func:`bayesbase.calibrate.model.model_values`) are padded to the
largest analyte's cells, method levels and breed pairs. A padded cell has no specimen (m = 0:
its density term is exactly 0, and at the quadrature's plain nodes the weights sum to 1), so
its ``cvi_z`` is a standard normal of its own; a padded method level has no specimen and a
Normal(0, 1) prior of its own. Padded entries are dropped from the result, which has the joint
fit's variables, dims and coords (``analyte``, ``cell``, ``method_level`` ...).

With nutpie the graph is compiled once per structure and each analyte's data are swapped in
(``with_data``); with PyMC the model's containers are reset (``pm.set_data``) and the kept
start and NUTS step functions are reused. The graphs and both kinds of compiled pieces are kept
across fits in one process (``_KEPT``, a :class:`bayesbase.mcmc.compiled.CompiledStore` keyed on
structure, breed levels, padded sizes and settings; at most 4), so the held-out folds and later
calibrations of the same shape skip the compile. Like the PyMC engine's kept models, this is
module-wide state: calibrations in concurrent threads of one process are not supported. The
convergence gate (:func:`bayesbase.calibrate.model.diagnostics`) runs on the combined posterior:
max R-hat and min ESS over every analyte, divergences summed.

Applies when the likelihood is taken from the animals' sufficient statistics (equal replicate
counts within each animal; :func:`bayesbase.calibrate.model.animal_stats`); otherwise
:func:`fit_split` fits the joint graph (:func:`bayesbase.calibrate.model.fit`).
"""
from __future__ import annotations

import time

import numpy as np

from ..mcmc.compiled import CompiledStore
from .core import CalibrationData

__all__ = ["applies", "analyte_part", "fit_split", "combine"]

#: posterior dims along which the analytes' parts are put together (a variable takes the first it has)
_JOIN_DIMS = ("analyte", "cell", "method_level", "rep_analyte", "age_analyte", "breed_center_all_dim_0")


def applies(data: CalibrationData, likelihood: str = "auto") -> bool:
    """True when :func:`fit_split` fits per analyte (module docstring)."""
    from .model import animal_stats

    return likelihood != "specimens" and animal_stats(data) is not None


def analyte_part(data: CalibrationData, i: int) -> CalibrationData:
    """The layout of analyte ``data.analytes[i]`` alone, with every breed level of ``data``."""
    a = data.analytes[i]
    from .model import _breed_grid

    breeds = _breed_grid(data)[0]
    cells = np.flatnonzero(data.cell_analyte == i)
    obs = np.flatnonzero(data.cell_analyte[data.obs_cell] == i)
    cell_new = np.full(len(data.cell_analyte), -1)
    cell_new[cells] = np.arange(len(cells))
    bp = [j for j, (ba, _) in enumerate(data.breed_pairs) if ba == a]
    bp_new = np.full(len(data.breed_pairs), -1)
    bp_new[bp] = np.arange(len(bp))
    kp = [k for k, (ma, _) in enumerate(data.bias_pairs) if ma == a]
    k_new = np.full(len(data.bias_pairs) + 1, len(kp))  # the reference level -> the part's K
    k_new[kp] = np.arange(len(kp))
    age = list(getattr(data, "age_analytes", []))
    return CalibrationData(
        analytes=[a], y=data.y[obs], n_rep=data.n_rep[obs], obs_cell=cell_new[data.obs_cell[obs]],
        obs_bias=k_new[data.obs_bias[obs]], cell_analyte=np.zeros(len(cells), dtype=int),
        cell_breed=bp_new[data.cell_breed[cells]], cell_animal=[data.cell_animal[c] for c in cells],
        breed_pairs=[data.breed_pairs[j] for j in bp], bias_pairs=[data.bias_pairs[k] for k in kp],
        reference={a: data.reference[a]}, ss_within=data.ss_within[i:i + 1], df_within=data.df_within[i:i + 1],
        log_n_rep=data.log_n_rep[i:i + 1], counts={k: v for k, v in data.counts.items() if k[0] == a},
        age_analytes=[a] if a in age else [], age_x=None if data.age_x is None else data.age_x[obs],
        age_ref={k: v for k, v in data.age_ref.items() if k == a},
        age_counts={k: v for k, v in data.age_counts.items() if k == a},
        age_notes={k: v for k, v in data.age_notes.items() if k == a}, breed_levels=breeds)


def _sizes(part: CalibrationData) -> dict:
    return {"cell": len(part.cell_analyte), "method_level": len(part.bias_pairs), "breed_pair": len(part.breed_pairs)}


def _structure(part: CalibrationData) -> tuple:
    return bool(part.df_within[0] > 0), bool(part.age_analytes)


#: PyMC graphs and their compiled pieces (log density and gradient, jittered start, trace; nutpie's
#: compile) kept across the fits of one process, per structure, breed levels, padded sizes and
#: settings: a later fit of the same shape (the next fold of a held-out proof,
#: :mod:`bayesbase.calibrate.heldout`, or the next analyte) swaps its data in (``pm.set_data``,
#: nutpie's ``with_data``) without compiling; the last 4 shapes stored are kept.
_KEPT = CompiledStore(max_entries=4)


class _Sampler:
    """Samples each analyte's part with one compiled graph per structure (module docstring)."""

    def __init__(self, sampler, pad, fit_kw):
        self.sampler, self.pad, self.kw = sampler, pad, fit_kw
        self.kept = {}  # structure -> its KeptModel of _KEPT (held for this fit)
        self.compile_seconds = 0.0
        self.sample_seconds = 0.0

    def _model(self, part, pri):
        from .model import build_model

        key = _structure(part)
        if key not in self.kept:
            shape = (key, len(part.breed_levels or ()), tuple(sorted(self.pad.items())),
                     tuple(sorted(self.kw.items())))
            self.kept[key] = _KEPT.entry(shape, lambda: build_model(
                part, pri, self.kw["breed_param"], self.kw["likelihood"], self.kw["cvi"], self.kw["nodes"],
                pad=self.pad, locations=self.kw["locations"]))
        return self.kept[key]

    def sample(self, part, pri, seed, draws, tune, chains, cores, target_accept):
        import pymc as pm

        from .model import model_values

        kept = self._model(part, pri)
        model = kept.model
        every = model_values(part, pri, self.kw["breed_param"], self.kw["likelihood"], self.kw["cvi"], self.pad,
                             self.kw["locations"])
        values = kept.set_data(every)  # also the initial point's data (nutpie's initial point reads them)
        if self.sampler == "pymc":
            from ..mcmc.compiled import kept_trace, nuts_start

            t0 = time.perf_counter()
            # pymc.sample's own start and NUTS step (jitter+adapt_diag, same seeds, same draws) built
            # with the kept compiled functions, which read the data from the model's containers
            start, step = nuts_start(kept, "fit", chains, seed, target_accept)
            idata = pm.sample(draws=draws, tune=tune, chains=chains, cores=cores, random_seed=seed, step=step,
                              initvals=start, trace=kept_trace(kept, "fit", start[0]),
                              progressbar=False, model=model, compute_convergence_checks=False,
                              return_inferencedata=True)
            self.sample_seconds += time.perf_counter() - t0
        else:
            idata = self._nutpie(kept, values, seed, draws, tune, chains, cores, target_accept)
        if self.kw["locations"] == "marginal":  # the locations, drawn from their exact conditional per draw
            from .model import draw_locations

            draw_locations(idata, every, part, {k: list(v) for k, v in model.coords.items()}, seed, self.pad)
        return idata

    def _nutpie(self, kept, values, seed, draws, tune, chains, cores, target_accept):
        try:
            import nutpie
        except ImportError as exc:  # optional extra
            raise ImportError("sampler='nutpie' needs the optional package nutpie "
                              "(pip install 'bayesbase[nutpie]')") from exc
        from ..mcmc.compiled import nutpie_compiled

        t0 = time.perf_counter()
        # compiled once per kept graph (the data just set: pm.set_data above); later analytes and fits
        # swap theirs in with with_data
        cm = nutpie_compiled(kept, "fit", values)
        t1 = time.perf_counter()
        idata = nutpie.sample(cm, draws=draws, tune=tune, chains=chains, cores=cores, seed=seed,
                              progress_bar=False, save_warmup=False, target_accept=target_accept)
        self.compile_seconds += t1 - t0
        self.sample_seconds += time.perf_counter() - t1
        return idata


def _join(pieces, dim):
    import xarray as xr

    return xr.concat(pieces, dim=dim, coords="minimal", compat="override", join="override")


def _piece(part, v, dim):
    n = {"cell": len(part.cell_analyte), "method_level": len(part.bias_pairs),
         "breed_center_all_dim_0": len(part.breed_pairs)}.get(dim)
    v = v if n is None else v.isel({dim: slice(0, n)})
    return v.drop_vars(dim, errors="ignore")


def combine(data: CalibrationData, parts, idatas):
    """The joint fit's InferenceData from the analytes' fits: padded entries dropped, every
    variable put together along its first dim of :data:`_JOIN_DIMS`, the joint coords restored;
    sample stats per draw gain an ``analyte`` dim (divergences of every analyte)."""
    import arviz as az
    import xarray as xr

    from .model import _breed_grid, _labels

    names = list(dict.fromkeys(n for i in idatas for n in i.posterior.data_vars))
    post = {}
    for name in names:
        have = [(p, i.posterior[name]) for p, i in zip(parts, idatas) if name in i.posterior]
        dim = next((d for d in _JOIN_DIMS if d in have[0][1].dims), None)
        if dim is not None:
            post[name] = _join([_piece(p, v, dim) for p, v in have], dim)
    ridx = np.flatnonzero(data.df_within > 0)
    coords = {"analyte": data.analytes, "cell": np.arange(len(data.cell_analyte)), "breed": _breed_grid(data)[0],
              "method_level": _labels(data.bias_pairs), "rep_analyte": [data.analytes[i] for i in ridx],
              "age_analyte": list(getattr(data, "age_analytes", [])),
              "breed_center_all_dim_0": np.arange(len(data.breed_pairs))}
    first = idatas[0].posterior
    ds = xr.Dataset(post)
    ds = ds.assign_coords({k: v for k, v in coords.items() if k in ds.dims})
    ds = ds.assign_coords(chain=first.chain.values, draw=first.draw.values)
    stats = {}
    for name, v in idatas[0].sample_stats.data_vars.items():
        if v.dims == ("chain", "draw") and all(name in i.sample_stats for i in idatas):
            stats[name] = xr.concat([i.sample_stats[name].drop_vars(["chain", "draw"]) for i in idatas], dim="analyte")
    ss = xr.Dataset(stats).assign_coords(analyte=data.analytes, chain=ds.chain.values, draw=ds.draw.values)
    return az.InferenceData(posterior=ds, sample_stats=ss.transpose("chain", "draw", "analyte"))


def fit_split(data: CalibrationData, pri: dict, *, draws: int = 1000, tune: int = 1000, chains: int = 4,
              seed: int = 0, sampler: str = "pymc", cores: int | None = None, target_accept: float = 0.9,
              breed_param: str = "auto", likelihood: str = "auto", cvi: str = "latent", nodes: int | None = None,
              locations: str = "auto"):
    """:func:`bayesbase.calibrate.model.fit`, one analyte at a time (module docstring); the
    joint fit when :func:`applies` is False. Analyte i samples with the i-th of the seeds
    ``numpy.random.default_rng(seed)`` draws (and, with ``locations`` marginal, draws its
    locations from their conditional with the same seed). Returns (idata, diagnostics, settings)."""
    from . import model as _m

    kw = dict(draws=draws, tune=tune, chains=chains, seed=seed, sampler=sampler, cores=cores,
              target_accept=target_accept, breed_param=breed_param, likelihood=likelihood, cvi=cvi, nodes=nodes,
              locations=locations)
    if not applies(data, likelihood):
        return _m.fit(data, pri, **kw)
    settings = _m.fit_settings(data, **kw)
    from ..mcmc.engine import ESS_MIN, RHAT_MAX  # also loads PyMC and ArviZ (notice handled there)

    with _m.quiet():
        t0 = time.perf_counter()
        parts = [analyte_part(data, i) for i in range(len(data.analytes))]
        pad = {k: max(_sizes(p)[k] for p in parts) for k in ("cell", "method_level", "breed_pair")}
        smp = _Sampler(sampler, pad, dict(breed_param=breed_param, likelihood=likelihood, cvi=cvi, nodes=nodes,
                                          locations=settings["locations_used"]))
        seeds = np.random.default_rng(seed).integers(0, 2**31 - 1, size=len(parts))
        idatas = [smp.sample(p, {k: np.asarray(v)[i:i + 1] for k, v in pri.items()}, int(seeds[i]), draws, tune,
                             chains, settings["cores"], target_accept) for i, p in enumerate(parts)]
        idata = combine(data, parts, idatas)
        settings.update(fit_form="per analyte", sample_seconds=round(smp.sample_seconds, 2),
                        compile_seconds=round(smp.compile_seconds, 2), compiled_graphs=len(smp.kept))
        _m.stamp(idata, settings)
        settings["seconds"] = time.perf_counter() - t0
        diag = _m.diagnostics(idata, RHAT_MAX, ESS_MIN)
    return idata, diag, settings
