"""Pseudonyms for exports (layer 1: standard library and pandas only, no project imports).

A patient id becomes ``P-`` + the first 10 hex digits of HMAC-SHA256(salt, "patient:" + id), a
specimen id ``S-`` + 10 hex digits of HMAC-SHA256(salt, "specimen:" + patient + "|" + specimen).
With the same salt the same id always gives the same pseudonym; without the salt a pseudonym
cannot be reversed. The results store keeps one random salt per store (``meta`` table,
:mod:`bayesbase.store`); a FHIR export without a salt uses a fresh random one
(:func:`bayesbase.io.write_bundle`), so two such exports cannot be linked.
"""
from __future__ import annotations

import hashlib
import hmac

__all__ = ["patient_pseudonym", "specimen_pseudonym", "pseudonymise_frame"]


def patient_pseudonym(salt: bytes, patient: str) -> str:
    """``P-`` + first 10 hex digits of HMAC-SHA256(salt, "patient:" + id)."""
    d = hmac.new(salt, f"patient:{patient}".encode(), hashlib.sha256).hexdigest()
    return "P-" + d[:10]


def specimen_pseudonym(salt: bytes, patient: str, specimen: str) -> str:
    """``S-`` + first 10 hex digits of HMAC-SHA256(salt, "specimen:" + patient + "|" + id)."""
    msg = f"specimen:{patient}|{specimen}".encode()
    return "S-" + hmac.new(salt, msg, hashlib.sha256).hexdigest()[:10]


def pseudonymise_frame(frame, salt: bytes):
    """Copy of a canonical frame with patient and specimen ids replaced by pseudonyms and
    ``source_file`` / ``source_row`` blanked (a file name may carry a name)."""
    import pandas as pd

    pats = frame["patient"].astype(str)
    specs = frame["specimen"].astype(str)
    pmap = {p: patient_pseudonym(salt, p) for p in pats.unique()}
    smap = {k: specimen_pseudonym(salt, *k) for k in set(zip(pats, specs))}
    out = frame.copy()
    out["patient"] = pd.array(pats.map(pmap).tolist(), dtype=frame["patient"].dtype)
    out["specimen"] = pd.array([smap[k] for k in zip(pats, specs)], dtype=frame["specimen"].dtype)
    out["source_file"] = pd.array([""] * len(out), dtype=frame["source_file"].dtype)
    out["source_row"] = pd.array([pd.NA] * len(out), dtype="Int64")
    return out
