"""Parsers of the identifying fields: patient and specimen ids, species."""
from __future__ import annotations

import re
from typing import TYPE_CHECKING

import numpy as np

from .columns import did_you_mean
from .text import invisible_char

if TYPE_CHECKING:
    from .context import Context

__all__ = ["SPECIES_ALIASES", "parse_ids", "parse_species"]

#: Accepted species spellings -> canonical species.
SPECIES_ALIASES = {
    "dog": "dog", "canine": "dog", "canis familiaris": "dog", "canis lupus familiaris": "dog",
    "cat": "cat", "feline": "cat", "felis catus": "cat",
    "horse": "horse", "equine": "horse", "equus caballus": "horse",
}


def parse_ids(ctx: Context) -> None:
    """Sets ``patient``, ``specimen`` and ``id_bad``: an empty id, or one with a control or
    invisible character (ids that look the same would differ), is a problem."""
    prob, present = ctx.problems, ctx.present
    patient = ctx.patient = ctx.col("patient")
    specimen = ctx.specimen = ctx.col("specimen")
    if "patient" in present:
        prob.add(patient.empty(), "patient", "patient is empty", "every row needs a patient id")
    if "specimen" in present:
        prob.add(specimen.empty(), "specimen", "specimen is empty",
                 "every row needs the id of its blood draw")
    ctx.id_bad = {}
    for name, c in (("patient", patient), ("specimen", specimen)):
        inv_u = np.array([invisible_char(u) for u in c.uniq], dtype=object)
        bad_u = inv_u != None  # noqa: E711
        ctx.id_bad[name] = bad_u[c.codes]
        if name in present and bad_u.any():
            prob.add(ctx.id_bad[name], name,
                     c.map(lambda u, name=name: f"{name} id '{u}' contains an invisible or "
                           f"control character ({invisible_char(u)})"),
                     "retype the id: invisible characters make ids that look the same differ")


def parse_species(ctx: Context) -> None:
    """Sets ``species`` (canonical name per row, None when unknown) and ``species_ok``."""
    prob = ctx.problems
    species_c = ctx.col("species")
    species_u = np.array([SPECIES_ALIASES.get(re.sub(r"\s+", " ", u.lower()), None)
                          for u in species_c.uniq], dtype=object)
    species = ctx.species = species_u[species_c.codes]
    ctx.species_ok = species != None  # noqa: E711  (object array comparison)
    if "species" in ctx.present:
        sp_empty = species_c.empty()
        prob.add(sp_empty, "species", "species is empty", "expected dog, cat or horse")
        bad = ~ctx.species_ok & ~sp_empty
        if bad.any():
            msgs = species_c.map(lambda u: f"unknown species '{u}'")
            hints = species_c.map(lambda u: did_you_mean(u.lower(), SPECIES_ALIASES,
                                                         "expected dog, cat or horse "
                                                         "(or canine, feline, equine)"))
            prob.add(bad, "species", msgs, hints)
