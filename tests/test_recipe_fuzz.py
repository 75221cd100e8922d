"""Hostile and extreme recipes, generated from the schema itself.

Every key of the schema is given a wrong type, NaN, inf and a value on each side of its range; a
few structural cases (an empty file, deep nesting, bytes that are not UTF-8, a table given twice)
are added.  Each must give one line on stderr, exit status 2, no traceback and no file written;
and every case that ``check`` accepts must also ``make --n 2`` (the edges of each range are such
cases).  This is the contract of the recipe checks (common practice for command-line tools: bad
input is one message and a non-zero status, never a crash).
"""

from __future__ import annotations

import dataclasses
import json
import math
import tomllib
import zlib
from pathlib import Path

import pytest

from simlens.cli import main
from simlens.recipe import Recipe
from simlens.recipe.schema import BandSettings, PsfSettings

from .conftest import FEATURES_RECIPE, SMALL_RECIPE

# Two recipes the cases start from: the small test recipe, and one with every optional table
# (stars plus halo, line of sight, subhalos, multipoles, quasar, second source, negatives, cuts).
BASES = {"small": tomllib.loads(SMALL_RECIPE), "features": tomllib.loads(FEATURES_RECIPE)}
BASE = BASES["small"]


# ------------------------------------------------------------------------------------------------
# A TOML writer for the cases (dotted keys, scalars and lists only): enough for recipes
# ------------------------------------------------------------------------------------------------
def _value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return "nan" if math.isnan(v) else ("inf" if v == math.inf else "-inf" if v == -math.inf else repr(v))
    if isinstance(v, int):
        return str(v)
    if isinstance(v, str):
        return json.dumps(v)  # JSON's escapes are TOML basic-string escapes
    if isinstance(v, list):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{json.dumps(k)} = {_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(v)


def to_toml(data: dict) -> str:
    lines = []

    def walk(prefix, d):
        for key, v in d.items():
            path = prefix + [json.dumps(key)]
            if isinstance(v, dict) and v and not _is_distribution(v):
                walk(path, v)
            else:
                lines.append(f"{'.'.join(path)} = {_value(v)}")

    walk([], data)
    return "\n".join(lines) + "\n"


def _is_distribution(d: dict) -> bool:
    return bool({"uniform", "log_uniform", "normal", "choice", "grid"} & set(d))


def with_value(path: tuple, value, base: str = "small") -> dict:
    data = json.loads(json.dumps(BASES[base]))
    if path[0] == "field":  # a field run: a small field keeps the case quick
        data["field"] = {"size": 256, "lenses": 2, "lens_stamp_size": 64}
    node = data
    for key in path[:-1]:
        node = node.setdefault(key, {})
        if not isinstance(node, dict):
            return None
    node[path[-1]] = value
    return data


# ------------------------------------------------------------------------------------------------
# Cases from the schema
# ------------------------------------------------------------------------------------------------
def schema_keys(cls=Recipe, prefix=()):
    """(path, metadata) of every leaf key, with the bands of the base recipe for the band tables."""
    for f in dataclasses.fields(cls):
        kind = f.metadata.get("kind")
        if kind is None:
            continue
        if kind == "table":
            yield from schema_keys(f.metadata["cls"], prefix + (f.name,))
        elif kind == "bands":
            yield from schema_keys(BandSettings, prefix + (f.name, "g"))
        elif kind == "band_colors":
            yield prefix + (f.name, "g"), dict(kind="parameter", low=-20, high=20)
        else:
            yield prefix + (f.name,), f.metadata


def _inside_edge(bound: float, meta: dict, side: str):
    if meta.get("integer"):
        return int(math.ceil(bound)) if side == "low" else int(math.floor(bound))
    if meta.get(f"{side}_open"):
        step = max(abs(bound), 1.0) * 1e-6
        return bound + step if side == "low" else bound - step
    return float(bound)


def generated_cases(base: str):
    cases = []
    for path, meta in schema_keys():
        if path[-1] in ("rest_filter", "filter"):  # filter names are checked by loading them
            continue
        name = f"{base}:" + ".".join(path)
        kind = meta["kind"]
        if kind in ("number", "parameter"):
            cases.append((f"{name}=text", path, "abc"))
            cases.append((f"{name}=nan", path, math.nan))
            cases.append((f"{name}=inf", path, math.inf))
            cases.append((f"{name}=-inf", path, -math.inf))
            cases.append((f"{name}=1e308", path, 1e308))
            lo, hi = meta["low"], meta["high"]
            if math.isfinite(lo):
                cases.append((f"{name}<low", path, lo - max(1.0, abs(lo))))
                cases.append((f"{name}@low", path, _inside_edge(lo, meta, "low")))
            if math.isfinite(hi):
                cases.append((f"{name}>high", path, hi + max(1.0, abs(hi))))
                cases.append((f"{name}@high", path, _inside_edge(hi, meta, "high")))
            if meta.get("integer"):
                cases.append((f"{name}=fraction", path, 1.5))
        elif kind == "interval":
            cases.append((f"{name}=text", path, "abc"))
            cases.append((f"{name}=reversed", path, [2.0, 1.0]))
            cases.append((f"{name}=nan", path, [math.nan, 1.0]))
            cases.append((f"{name}=three", path, [1.0, 2.0, 3.0]))
        elif kind == "text":
            cases.append((f"{name}=number", path, 5))
            cases.append((f"{name}=long", path, "x" * 100_000))
            cases.append((f"{name}=newline", path, "a\nb"))
        elif kind == "flag":
            cases.append((f"{name}=text", path, "yes"))
    return cases


CASES = [case + (base,) for base in BASES for case in generated_cases(base)]
# The default suite runs a fixed sample of the cases (a checksum of the label picks one in eight
# of the small recipe's and one in forty of the slower full-featured recipe's, spread over the schema); `pytest -m slow` runs all of them.
SAMPLE = [c for c in CASES if zlib.crc32(c[0].encode()) % (8 if c[3] == "small" else 40) == 0]
REST = [c for c in CASES if c not in SAMPLE]
STRUCTURAL = {
    "empty file": b"",
    "only a comment": b"# nothing here\n",
    "deep inline tables": b"a = " + b"{b = " * 3000 + b"1" + b"}" * 3000 + b"\n",
    "deep arrays": b"a = " + b"[" * 3000 + b"1" + b"]" * 3000 + b"\n",
    "deep dotted keys": b"survey." + b".".join(b"k%d" % i for i in range(200)) + b" = 1\n",
    "not UTF-8": b"name = \"caf\xe9\"\n",
    "binary": bytes(range(256)) * 4,
    "duplicate table": SMALL_RECIPE.encode() + b"\n[survey]\npixel_scale = 0.3\n",
    "table as a number": to_toml({**BASE, "survey": 3}).encode(),
    "unknown top-level table": (SMALL_RECIPE + "\n[surveys]\nx = 1\n").encode(),
    "huge key": (SMALL_RECIPE + "\n" + "k" * 200_000 + " = 1\n").encode(),
    "bands empty": to_toml({**BASE, "survey": {**BASE["survey"], "bands": {}}}).encode(),
    "band name non-ASCII": SMALL_RECIPE.replace("[survey.bands.g]", '[survey.bands."gé"]').encode(),
    "band name 60 characters": SMALL_RECIPE.replace("[survey.bands.g]", "[survey.bands." + "g" * 60 + "]").encode(),
    "no survey": to_toml({k: v for k, v in BASE.items() if k != "survey"}).encode(),
}


def _run(capsys, args):
    capsys.readouterr()
    try:
        status = main(args)
    except SystemExit as exc:  # argparse
        status = exc.code
    captured = capsys.readouterr()
    return status, captured.err


def _assert_one_line_refusal(capsys, tmp_path, recipe_path, label):
    status, err = _run(capsys, ["check", str(recipe_path), "--sample", "3"])
    lines = err.strip().splitlines()
    assert status == 2, (label, status, err[-500:])
    assert len(lines) == 1 and lines[0].startswith("simlens: error: "), (label, err[-500:])
    assert "Traceback" not in err and len(lines[0]) < 1000, label
    out = tmp_path / "out"
    status, err = _run(capsys, ["make", str(recipe_path), "--out", str(out), "--n", "2", "--quiet"])
    assert status == 2 and len(err.strip().splitlines()) == 1, (label, err[-500:])
    assert not out.exists(), f"{label}: make wrote {out} for a recipe check refused"


def _make_finishes(capsys, tmp_path, recipe_path, label):
    out = tmp_path / "out"
    status, err = _run(capsys, ["make", str(recipe_path), "--out", str(out), "--n", "2", "--quiet"])
    assert "Traceback" not in err, (label, err[-2000:])
    if status == 2:  # the pre-flight may refuse a run this machine cannot hold; then nothing is written
        assert "memory" in err or "disk" in err, (label, err)
        assert not out.exists(), label
        return
    assert status == 0, (label, err[-1000:])
    assert (out / "truth.fits").is_file(), label


def _case_ids(cases):
    return [c[0] for c in cases]


def _write_case(tmp_path, path, value, base="small") -> Path | None:
    data = with_value(path, value, base)
    if data is None:
        return None
    recipe_path = tmp_path / "case.toml"
    recipe_path.write_text(to_toml(data), encoding="utf-8")
    return recipe_path


def _accepted(recipe_path) -> bool:
    from simlens.errors import RecipeError
    from simlens.recipe import load_recipe

    try:
        load_recipe(recipe_path)
    except RecipeError:
        return False
    return True


def test_the_schema_gives_enough_cases():
    assert len(SAMPLE) >= 60 and len(STRUCTURAL) >= 10


def _generated_case(label, path, value, base, tmp_path, capsys):
    """Refused in one line with nothing written, or accepted and made."""
    recipe_path = _write_case(tmp_path, path, value, base)
    assert recipe_path is not None
    if not _accepted(recipe_path):
        _assert_one_line_refusal(capsys, tmp_path, recipe_path, label)
        return
    assert not (isinstance(value, float) and not math.isfinite(value)), f"{label}: a non-finite number accepted"
    _make_finishes(capsys, tmp_path, recipe_path, label)


@pytest.mark.parametrize("label, path, value, base", SAMPLE, ids=_case_ids(SAMPLE))
def test_generated_case(label, path, value, base, tmp_path, capsys):
    _generated_case(label, path, value, base, tmp_path, capsys)


@pytest.mark.slow
@pytest.mark.parametrize("label, path, value, base", REST, ids=_case_ids(REST))
def test_generated_case_all(label, path, value, base, tmp_path, capsys):
    _generated_case(label, path, value, base, tmp_path, capsys)


@pytest.mark.parametrize("label", sorted(STRUCTURAL))
def test_structural_case(label, tmp_path, capsys):
    recipe_path = tmp_path / "case.toml"
    recipe_path.write_bytes(STRUCTURAL[label])
    _assert_one_line_refusal(capsys, tmp_path, recipe_path, label)


def test_missing_required_key_is_named(tmp_path, capsys):
    data = json.loads(json.dumps(BASE))
    del data["survey"]["pixel_scale"]
    recipe_path = tmp_path / "case.toml"
    recipe_path.write_text(to_toml(data))
    status, err = _run(capsys, ["check", str(recipe_path)])
    assert status == 2 and "survey.pixel_scale: required" in err


def test_echoed_values_are_truncated(tmp_path, capsys):
    recipe_path = tmp_path / "case.toml"
    recipe_path.write_text(to_toml(with_value(("lens", "mass", "model"), "m" * 10_000_000)))
    status, err = _run(capsys, ["check", str(recipe_path)])
    assert status == 2 and len(err) < 400, len(err)


def test_a_filter_file_is_never_quoted(tmp_path, capsys):
    secret = tmp_path / "secret.txt"
    secret.write_text("the-first-line-of-a-private-file\n")
    data = with_value(("survey", "bands", "g", "filter"), str(secret))
    recipe_path = tmp_path / "case.toml"
    recipe_path.write_text(to_toml(data))
    status, err = _run(capsys, ["check", str(recipe_path)])
    assert status == 2 and "private" not in err and "filter" in err


def test_psf_fwhm_range_is_a_survey_range():
    # Common practice: seeing-limited ground surveys 0.5-2 arcsec, space 0.05-0.2 arcsec.
    meta = PsfSettings.__dataclass_fields__["fwhm"].metadata
    assert meta["low"] <= 0.05 and 2.0 <= meta["high"] <= 20
