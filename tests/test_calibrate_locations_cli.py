"""``bayesbase calibrate --locations`` and the sentence of calibration.html that names the form the
fit used for the location parameters (population centre, breed offsets, method biases, age slope).

Outside references named beside each check:
* argparse: an unknown ``--locations`` value is refused with its usage error (exit code 2);
* the Python API ``bayesbase.calibrate.calibrate`` and its ``LOCATIONS``: the command offers the
  same forms, hands the chosen one over unchanged, and a combination the API refuses gives the
  API's own message (no traceback);
* the posterior's ``locations`` attr stamped by the fit (``bayesbase.calibrate.model.stamp``):
  the page's sentence follows it.
Data are invented (``simulate_store``), no real animal.
"""
from __future__ import annotations

import argparse

import pandas as pd
import pytest

from bayesbase.calibrate.simulate import simulate_store
from bayesbase.errors import BayesbaseError

# what the page must say for each form (plain words, checked literally)
MARGINAL_WORDS = "integrated out of the model exactly"
SAMPLED_WORDS = "sampled by NUTS"


def _parser():
    from bayesbase.calibrate import cli

    ap = argparse.ArgumentParser(prog="bayesbase")
    cli.add_parser(ap.add_subparsers(dest="command"))
    return ap


def _store(tmp_path, unequal_replicates: bool = False):
    """An invented store of 8 dogs x 2 specimens of creatinine; optionally one specimen of the
    first dog measured twice (so that dog's specimens have unequal replicate counts)."""
    from bayesbase.store import Store

    frame, _ = simulate_store(seed=3, n_animals=8, n_specimens=2)
    if unequal_replicates:
        extra = frame.iloc[[0]].copy()
        extra["replicate"] = 2
        extra["value"] = extra["value"] * 1.02
        frame = (pd.concat([frame, extra]).sort_values(["patient", "collected_at", "specimen", "analyte",
                                                        "replicate"]).reset_index(drop=True))
    db = tmp_path / "store.db"
    with Store(db) as st:
        st.import_frame(frame, "invented")
    return db


# --------------------------------------------------------------------------- the option
def test_the_option_offers_the_api_forms_and_defaults_to_auto():
    """Outside reference: the API's ``LOCATIONS`` (the cli writes its choices out to keep --help light)."""
    from bayesbase.calibrate import cli
    from bayesbase.calibrate.model import LOCATIONS

    assert set(cli.LOCATION_CHOICES) == set(LOCATIONS) and len(cli.LOCATION_CHOICES) == len(LOCATIONS)
    assert _parser().parse_args(["calibrate", "--db", "x.db", "--out", "o"]).locations == "auto"


@pytest.mark.parametrize("given, expected", [(None, "auto"), ("auto", "auto"), ("marginal", "marginal"),
                                             ("sampled", "sampled")])
def test_the_option_reaches_calibrate(monkeypatch, capsys, given, expected):
    """The value goes to ``calibrate(locations=...)`` unchanged (the API stubbed to record its
    arguments and stop: nothing is sampled)."""
    from bayesbase.calibrate import job
    from bayesbase.cli.main import main

    seen = {}

    def record(source, **kw):
        seen.update(kw, source=source)
        raise BayesbaseError("stopped by the test after recording the arguments")

    monkeypatch.setattr(job, "calibrate", record)
    argv = ["calibrate", "--db", "invented.db", "--out", "o", "--draws", "7"]
    assert main(argv + ([] if given is None else ["--locations", given])) == 2
    assert seen["locations"] == expected
    assert seen["source"] == "invented.db" and seen["draws"] == 7  # the other settings travel beside it
    assert "stopped by the test" in capsys.readouterr().err


def test_argparse_refuses_an_unknown_form(capsys):
    """Outside reference: argparse's ``choices`` check (usage error, exit code 2, names the choices)."""
    with pytest.raises(SystemExit) as ei:
        _parser().parse_args(["calibrate", "--db", "x.db", "--out", "o", "--locations", "integrated"])
    assert ei.value.code == 2
    err = capsys.readouterr().err
    assert "invalid choice: 'integrated'" in err and "'marginal'" in err and "'sampled'" in err


def test_marginal_where_it_is_not_exact_gives_the_api_error(tmp_path, capsys):
    """A dog whose specimens have unequal replicate counts has no sufficient statistics, so the
    locations do not integrate out exactly: the API raises ValueError before sampling, and the
    command prints that same message as a user error (exit code 2, no traceback, no files)."""
    from bayesbase.calibrate.job import calibrate
    from bayesbase.cli.main import main

    db = _store(tmp_path, unequal_replicates=True)
    with pytest.raises(ValueError) as ei:
        calibrate(db, species="dog", locations="marginal", draws=5, tune=5, chains=1)
    api_msg = str(ei.value)
    assert "equal replicate counts" in api_msg
    out = tmp_path / "out"
    assert main(["calibrate", "--db", str(db), "--out", str(out), "--locations", "marginal"]) == 2
    err = capsys.readouterr().err
    assert err == f"bayesbase: error: {api_msg}\n"
    assert "Traceback" not in err and not out.exists()


# --------------------------------------------------------------------------- the page
@pytest.mark.parametrize("form, says, not_says", [("marginal", MARGINAL_WORDS, SAMPLED_WORDS),
                                                  ("sampled", SAMPLED_WORDS, MARGINAL_WORDS)])
def test_the_page_names_the_form_the_fit_used(tmp_path, form, says, not_says):
    """The sentence follows the posterior's ``locations`` attr (a calibration built by hand, as in
    test_calibrate's fragment tests; no sampling)."""
    from test_calibrate import _fake_calibration

    from bayesbase.calibrate.output import calibration_html

    cal = _fake_calibration(tmp_path)
    cal.idata.posterior.attrs["locations"] = form
    page = calibration_html(cal)
    start = page.index("<p>Location parameters (population centre, breed offsets, method biases, age slope): ")
    sentence = page[start:page.index("</p>", start)]
    assert says in sentence and not_says not in sentence
    assert page.index("<h2>Convergence</h2>") > start  # in the settings part, before the results
    if form == "marginal":
        assert "drawn for each posterior draw from their exact conditional distribution" in sentence


def test_a_page_without_the_stamp_says_so(tmp_path):
    """A calibration whose posterior carries no ``locations`` attr (built by hand) is not guessed at."""
    from test_calibrate import _fake_calibration

    from bayesbase.calibrate.output import calibration_html

    cal = _fake_calibration(tmp_path)
    cal.idata.posterior.attrs.pop("locations", None)
    page = calibration_html(cal)
    assert "Location parameters (population centre, breed offsets, method biases, age slope): form not recorded" in page
    assert MARGINAL_WORDS not in page and SAMPLED_WORDS not in page


@pytest.mark.slow
@pytest.mark.parametrize("form, says", [("sampled", SAMPLED_WORDS), ("marginal", MARGINAL_WORDS)])
def test_the_command_fits_with_the_chosen_form_and_the_page_says_it(tmp_path, capsys, form, says):
    """End to end on an invented 8-dog store (PyMC's NUTS, 2 chains x 20 draws after 20 tuning:
    far too short to converge, exit code 3, which is not what is checked here): the fit's stamp
    (idata.nc, read back with arviz) is the chosen form and the page says it."""
    import arviz as az

    from bayesbase.cli.main import main

    db = _store(tmp_path)
    out = tmp_path / form
    rc = main(["calibrate", "--db", str(db), "--out", str(out), "--locations", form, "--draws", "20",
               "--tune", "20", "--chains", "2", "--seed", "1", "--no-figure"])
    assert rc in (0, 3)
    capsys.readouterr()
    assert az.from_netcdf(out / "idata.nc").posterior.attrs["locations"] == form
    page = (out / "calibration.html").read_text(encoding="utf-8")
    start = page.index("<p>Location parameters")
    assert says in page[start:page.index("</p>", start)]
