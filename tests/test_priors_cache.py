"""The process-wide pack cache (:func:`bayesbase.priors.cached_pack`): the same object while the
pack's files are unchanged, a fresh load once any of them (the pack, a fragment's base, a lab
override CSV) changed on disk. A pack's hash is checked against hashlib's SHA-256 of the bytes
on disk (the reference implementation of FIPS 180-4), not against the project's own hashing."""
from __future__ import annotations

import hashlib
import os
from importlib import resources

import pandas as pd
import pytest

from bayesbase import priors
from bayesbase.assessment import assess
from bayesbase.errors import PackError
from bayesbase.priors import cache


@pytest.fixture(autouse=True)
def _empty_cache():
    priors.clear_pack_cache()
    yield
    priors.clear_pack_cache()


def _dog_bytes() -> bytes:
    return resources.files("bayesbase.models").joinpath("dog.toml").read_bytes()


def _pack_file(tmp_path, version="2026.12", name="mydog.toml"):
    """A full pack file: the built-in dog pack with its version line set to ``version``."""
    raw = _dog_bytes().decode("utf-8")
    line = next(x for x in raw.splitlines() if x.startswith("version = "))
    path = tmp_path / name
    path.write_text(raw.replace(line, f'version = "{version}"', 1), encoding="utf-8")
    return path


def test_builtin_pack_is_loaded_once_and_matches_load_pack():
    a = priors.cached_pack("dog")
    assert priors.cached_pack("dog") is a
    fresh = priors.load_pack("dog")
    assert a is not fresh and a == fresh
    assert a.sha256 == hashlib.sha256(_dog_bytes()).hexdigest()


def test_same_file_same_object_and_an_edited_file_is_read_again(tmp_path):
    path = _pack_file(tmp_path, "1")
    a = priors.cached_pack(str(path))
    assert priors.cached_pack(str(path)) is a and a.version == "1"
    path.write_text(path.read_text(encoding="utf-8").replace('version = "1"', 'version = "2"', 1),
                    encoding="utf-8")
    b = priors.cached_pack(str(path))
    assert b is not a and b.version == "2"
    assert b.sha256 == hashlib.sha256(path.read_bytes()).hexdigest() != a.sha256
    assert priors.cached_pack(path) is b  # a Path and its text name the same file


def test_edit_with_same_size_and_mtime_is_caught_by_the_content_hash(tmp_path):
    path = _pack_file(tmp_path, "A")
    a = priors.cached_pack(str(path))
    st = path.stat()
    path.write_bytes(path.read_bytes().replace(b'version = "A"', b'version = "B"', 1))
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert path.stat().st_size == st.st_size and path.stat().st_mtime_ns == st.st_mtime_ns
    b = priors.cached_pack(str(path))
    assert b is not a and (a.version, b.version) == ("A", "B")


def test_fragment_is_read_again_when_its_base_file_changes(tmp_path):
    base = _pack_file(tmp_path, "1", name="base.toml")
    frag = tmp_path / "frag.toml"
    frag.write_text('[pack]\nid = "frag"\nspecies = "dog"\ntitle = "test fragment"\nversion = "f"\n'
                    'extends = "base.toml"\n', encoding="utf-8")
    a = priors.cached_pack(str(frag))
    assert priors.cached_pack(str(frag)) is a
    base.write_text(base.read_text(encoding="utf-8").replace('version = "1"', 'version = "22"', 1),
                    encoding="utf-8")
    b = priors.cached_pack(str(frag))
    assert b is not a
    # the layered hash covers the bytes of every file, base first (see bayesbase.priors.layers)
    assert b.sha256 == hashlib.sha256(base.read_bytes() + frag.read_bytes()).hexdigest() != a.sha256


def test_override_csv_edit_is_read_again(tmp_path):
    csv = tmp_path / "lab.csv"
    csv.write_text("analyte,cvi_pct\nalt,20\n", encoding="utf-8")
    a = priors.cached_pack("dog", overrides=csv)
    assert priors.cached_pack("dog", overrides=str(csv)) is a
    assert a.get("alt").cvi == pytest.approx(0.20)
    csv.write_text("analyte,cvi_pct\nalt,25\n", encoding="utf-8")
    b = priors.cached_pack("dog", overrides=csv)
    assert b is not a and b.get("alt").cvi == pytest.approx(0.25)
    assert b.sha256 == hashlib.sha256(_dog_bytes() + csv.read_bytes()).hexdigest()
    assert priors.cached_pack("dog") is not b  # without the override: another entry


def test_errors_are_not_cached(tmp_path):
    path = tmp_path / "broken.toml"
    path.write_text("[pack\n", encoding="utf-8")
    for _ in range(2):
        with pytest.raises(PackError, match="TOML syntax error"):
            priors.cached_pack(str(path))
    good = _pack_file(tmp_path, "ok", name="broken.toml")
    assert priors.cached_pack(str(good)).version == "ok"
    with pytest.raises(PackError, match="unknown pack"):
        priors.cached_pack("no_such_pack")


def test_cache_is_bounded(tmp_path, monkeypatch):
    monkeypatch.setattr(cache, "MAX_PACKS", 2)
    packs = [priors.cached_pack(str(_pack_file(tmp_path, str(i), name=f"p{i}.toml"))) for i in range(3)]
    assert len(cache._PACKS) == 2
    assert priors.cached_pack(str(tmp_path / "p2.toml")) is packs[2]
    assert priors.cached_pack(str(tmp_path / "p0.toml")) is not packs[0]  # dropped, loaded again


def test_assess_takes_its_packs_from_the_cache(tmp_path):
    frame = pd.DataFrame({
        "patient": ["P1"] * 3, "species": ["dog"] * 3, "specimen": ["S1", "S2", "S3"],
        "collected_at": ["2026-01-05 09:00", "2026-03-05 09:00", "2026-06-05 09:00"],
        "analyte": ["creatinine"] * 3, "value": ["90", "95", "120"], "unit": ["umol/L"] * 3,
    })
    a1 = assess(frame)
    a2 = assess(frame)
    assert a1.packs["dog"] is a2.packs["dog"] is priors.cached_pack("dog")
    path = _pack_file(tmp_path, "x")
    a3 = assess(frame, pack=str(path))
    assert a3.packs["dog"] is priors.cached_pack(str(path))
    assert a3.attrs["pack_sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
