"""Parsers of the free-text fields: breed, sex, method, and the reported value and unit
columns a file written by ``to_tidy_csv`` carries."""
from __future__ import annotations

import re
from typing import TYPE_CHECKING

import numpy as np

from .text import clean_free_text

if TYPE_CHECKING:
    from .context import Context

__all__ = ["parse_free_text"]

_SEX = {"f": "female", "female": "female", "m": "male", "male": "male",
        "fs": "female_neutered", "sf": "female_neutered", "fn": "female_neutered",
        "female_spayed": "female_neutered", "spayed_female": "female_neutered",
        "female_neutered": "female_neutered", "neutered_female": "female_neutered",
        "fi": "female_intact", "fe": "female_intact", "female_intact": "female_intact",
        "female_entire": "female_intact", "intact_female": "female_intact",
        "mn": "male_neutered", "nm": "male_neutered", "mc": "male_neutered",
        "male_neutered": "male_neutered", "male_castrated": "male_neutered",
        "castrated_male": "male_neutered", "neutered_male": "male_neutered",
        "gelding": "male_neutered",
        "mi": "male_intact", "me": "male_intact", "male_intact": "male_intact",
        "male_entire": "male_intact", "intact_male": "male_intact", "stallion": "male_intact",
        "mare": "female_intact"}


def parse_free_text(ctx: Context) -> None:
    """Sets ``breed``/``breed_u``, ``sex``/``sex_u``, ``method``, ``reported_value``,
    ``reported_unit`` and ``cleaned_rows``: control and invisible characters are removed from
    free text (noted later), breeds lower-cased, sexes mapped to the contract's words."""
    sex_c = ctx.sex = ctx.col("sex")
    ctx.sex_u = np.array([_SEX.get(k, k) for k in
                          (re.sub(r"[^0-9a-z]+", "_", u.lower()).strip("_") for u in sex_c.uniq)],
                         dtype=object)
    ctx.breed = ctx.col("breed")
    ctx.method = ctx.col("method")
    ctx.reported_value = ctx.col("reported_value")
    ctx.reported_unit = ctx.col("reported_unit")
    ctx.cleaned_rows = np.zeros(ctx.n, dtype=bool)
    for c in (ctx.breed, ctx.method, ctx.reported_value, ctx.reported_unit):
        clean = np.array([clean_free_text(u) for u in c.uniq], dtype=object)
        changed = clean != c.uniq
        if changed.any():
            ctx.cleaned_rows |= changed[c.codes]
            c.uniq = clean
    ctx.breed_u = np.array([re.sub(r"\s+", " ", u.lower()) for u in ctx.breed.uniq], dtype=object)
