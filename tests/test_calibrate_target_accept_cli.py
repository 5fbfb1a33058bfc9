"""``bayesbase calibrate --target-accept``: the NUTS target acceptance rate reaches the fit.

Outside references named beside each check:
* argparse: a value its ``type`` refuses is a usage error (exit code 2, message on stderr);
* the Python API ``bayesbase.calibrate.calibrate(target_accept=...)``: the command hands the value
  over unchanged; the default is the API's own default;
* the posterior's ``target_accept`` attr stamped by the fit (``bayesbase.calibrate.model.stamp``)
  and written into ``idata.nc`` (read back with ``arviz.from_netcdf``).
Data are invented (``simulate_store``), no real animal.
"""
from __future__ import annotations

import argparse
import inspect

import pytest

from bayesbase.errors import BayesbaseError


def _parser():
    from bayesbase.calibrate import cli

    ap = argparse.ArgumentParser(prog="bayesbase")
    cli.add_parser(ap.add_subparsers(dest="command"))
    return ap


def test_default_is_the_api_default():
    """Outside reference: the signature of ``bayesbase.calibrate.job.calibrate``."""
    from bayesbase.calibrate.job import calibrate

    api_default = inspect.signature(calibrate).parameters["target_accept"].default
    assert _parser().parse_args(["calibrate", "--db", "x.db", "--out", "o"]).target_accept == api_default


@pytest.mark.parametrize("given", ["0.85", "0.5", "0.99"])
def test_the_value_reaches_calibrate(monkeypatch, capsys, given):
    """The parsed float goes to ``calibrate(target_accept=...)`` unchanged (the API stubbed to
    record its arguments and stop: nothing is sampled)."""
    from bayesbase.calibrate import job
    from bayesbase.cli.main import main

    seen = {}

    def record(source, **kw):
        seen.update(kw)
        raise BayesbaseError("stopped by the test after recording the arguments")

    monkeypatch.setattr(job, "calibrate", record)
    assert main(["calibrate", "--db", "invented.db", "--out", "o", "--target-accept", given]) == 2
    assert seen["target_accept"] == float(given)
    assert "stopped by the test" in capsys.readouterr().err


@pytest.mark.parametrize("given, words", [("1", "between 0 and 1"), ("0", "between 0 and 1"),
                                          ("-0.2", "between 0 and 1"), ("high", "not a number")])
def test_argparse_refuses_a_value_outside_the_open_interval(capsys, given, words):
    """Outside reference: argparse's handling of a ``type`` that raises ArgumentTypeError (usage
    error, exit code 2)."""
    with pytest.raises(SystemExit) as ei:
        _parser().parse_args(["calibrate", "--db", "x.db", "--out", "o", "--target-accept", given])
    assert ei.value.code == 2
    err = capsys.readouterr().err
    assert "--target-accept" in err and words in err


def test_a_fit_stamps_the_rate_into_idata(tmp_path):
    """A real (tiny) fit through the command: idata.nc's posterior carries the rate given."""
    import arviz as az

    from bayesbase.calibrate.simulate import simulate_store
    from bayesbase.cli.main import main
    from bayesbase.store import Store

    frame, _ = simulate_store(seed=3, n_animals=8, n_specimens=2)
    db = tmp_path / "store.db"
    with Store(db) as st:
        st.import_frame(frame, "invented")
    out = tmp_path / "out"
    code = main(["calibrate", "--db", str(db), "--out", str(out), "--draws", "30", "--tune", "30", "--chains", "2",
                 "--target-accept", "0.85", "--no-figure", "--force"])
    assert code in (0, 3)  # 2 x 30 draws need not converge; --force writes the files either way
    post = az.from_netcdf(out / "idata.nc").posterior
    assert float(post.attrs["target_accept"]) == 0.85
