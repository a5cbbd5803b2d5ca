"""Build the project's atomic data (calibration/atomic/) from the shared NIST ASD extracts.

Usage::

    python calibration/build_linelist.py [SOURCE_DIR] [--out OUT_DIR]

``SOURCE_DIR`` holds ``nist_asd_lines_350_900nm.csv``, ``nist_asd_levels.csv`` and
``nist_asd_ionization_energies.csv`` (default: ``../shared/data`` next to the repository).
``OUT_DIR`` defaults to ``calibration/atomic`` beside this script. The script is
deterministic and can be re-run at any time; each output is written to a temporary file
and renamed into place, so a failed run leaves the previous files untouched.

What it does (the reasons are in calibration/atomic/SOURCES.md):

* renames species to spectroscopic notation ("Fe", 1 -> "Fe I");
* keeps every line, with its transition type (E1 allowed; M1/E2/M2 forbidden);
* builds a multiplet label from the lower and upper terms (and configurations where a
  term has no prefix letter), e.g. "a 5F - z 5D*";
* finds the three composition groups of contract section 6 from the data by their term
  pairs, using the contract's wavelengths as anchors, and checks them;
* copies the levels and ionization energies in the same species notation.
"""

from __future__ import annotations

import argparse
import csv
import hashlib
import os
import re
import sys
import tempfile
from pathlib import Path

LINES_FILE = "nist_asd_lines_350_900nm.csv"
LEVELS_FILE = "nist_asd_levels.csv"
IONIZATION_FILE = "nist_asd_ionization_energies.csv"

# sha256 of the shared extracts this list was last built from (also in SOURCES.md).
KNOWN_SHA256 = {
    LINES_FILE: "cae57e3ddb29e9f84999057231d65ab6a9748ca7ab44e17a1911fcc735848e03",
    LEVELS_FILE: "1cc8c959d7e287aea4168f45445753ff489a371ce66f32dbe483820f3b8ffe77",
    IONIZATION_FILE: "9b4198221e958ff2e13c2f19e65363c80315b42d2a8a9461706363d4a5d20b1c",
}

ROMAN = {1: "I", 2: "II", 3: "III"}

LINE_COLUMNS = [
    "species", "element", "ion", "wavelength_air_nm", "wavelength_vac_nm", "A_ki_s",
    "E_upper_eV", "E_lower_eV", "g_upper", "g_lower", "acc", "type",
    "conf_lower", "term_lower", "J_lower", "conf_upper", "term_upper", "J_upper",
    "multiplet", "group", "tp_ref",
]

# Contract section 6. Anchor wavelengths (air, nm) pick the term pair; "window_nm" limits the
# members counted (None: every allowed member of the multiplet in the source).
GROUPS = {
    "na": {"species": "Na I", "anchors_nm": [588.995, 589.592], "window_nm": None,
           "exact": True},
    "mg": {"species": "Mg I", "anchors_nm": [516.732, 517.268, 518.360], "window_nm": None,
           "exact": True},
    "fe": {"species": "Fe I",
           "anchors_nm": [526.95, 532.80, 537.15, 540.58, 543.45, 544.69, 545.56],
           "window_nm": (526.0, 546.0), "exact": False},
}
ANCHOR_TOL_NM = 0.01   # anchors are given to 0.01 nm or better
CONTRACT_TOL_NM = 0.001  # contract na/mg wavelengths are rounded to 1 pm

_PREFIXED_TERM = re.compile(r"^[a-z] ")


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _read_csv(path: Path, required: list[str]) -> list[dict[str, str]]:
    if not path.is_file():
        raise SystemExit(f"{path}: file not found")
    with path.open(newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        missing = [c for c in required if c not in (reader.fieldnames or [])]
        if missing:
            raise SystemExit(f"{path}: missing columns {', '.join(missing)}")
        return list(reader)


def _level_label(conf: str, term: str) -> str:
    """One side of a multiplet label: the term alone if it carries a prefix letter
    (NIST/Moore letters make it unique within a spectrum), else configuration + term."""
    conf, term = conf.strip(), term.strip()
    if _PREFIXED_TERM.match(term):
        return term
    if conf.isdigit() and not term:  # hydrogen: the configuration is the principal quantum number
        return f"n={conf}"
    return " ".join(p for p in (conf, term) if p) or "?"


def multiplet_label(row: dict[str, str]) -> str:
    return (f"{_level_label(row['conf_lower'], row['term_lower'])} - "
            f"{_level_label(row['conf_upper'], row['term_upper'])}")


def _term_pair(row: dict[str, str]) -> tuple[str, str, str, str]:
    return (row["conf_lower"], row["term_lower"], row["conf_upper"], row["term_upper"])


def assign_groups(rows: list[dict[str, str]]) -> dict[str, list[dict[str, str]]]:
    """Mark the contract section 6 groups in ``rows`` (sets row["group"]); return the members."""
    members: dict[str, list[dict[str, str]]] = {}
    for name, spec in GROUPS.items():
        allowed = [r for r in rows if r["species"] == spec["species"] and r["type"] == "E1"]
        common: set | None = None
        for anchor in spec["anchors_nm"]:
            near = {_term_pair(r) for r in allowed
                    if abs(float(r["wavelength_air_nm"]) - anchor) <= ANCHOR_TOL_NM}
            common = near if common is None else common & near
        if not common or len(common) != 1:
            raise SystemExit(f"group {name}: anchors {spec['anchors_nm']} do not share exactly one "
                             f"term pair (found {sorted(common or [])})")
        pair = common.pop()
        chosen = [r for r in allowed if _term_pair(r) == pair]
        if spec["window_nm"] is not None:
            lo, hi = spec["window_nm"]
            chosen = [r for r in chosen if lo <= float(r["wavelength_air_nm"]) <= hi]
        chosen.sort(key=lambda r: float(r["wavelength_air_nm"]))
        if spec["exact"]:
            got = [float(r["wavelength_air_nm"]) for r in chosen]
            want = sorted(spec["anchors_nm"])
            off = [abs(g - w) > CONTRACT_TOL_NM for g, w in zip(got, want)]
            if len(got) != len(want) or any(off):
                raise SystemExit(f"group {name}: members {got} differ from contract {want}")
        for r in chosen:
            r["group"] = name
        members[name] = chosen
    return members


def _write_csv(path: Path, columns: list[str], rows: list[dict[str, str]]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=path.name + ".", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", newline="", encoding="utf-8") as fh:
            writer = csv.DictWriter(fh, fieldnames=columns, extrasaction="ignore",
                                    lineterminator="\n")
            writer.writeheader()
            writer.writerows(rows)
        os.chmod(tmp, 0o644)  # mkstemp makes owner-only files; these are shared data
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _species(element: str, ion: str, path: Path) -> str:
    try:
        return f"{element} {ROMAN[int(ion)]}"
    except (KeyError, ValueError):
        raise SystemExit(f"{path}: unexpected ionisation stage {ion!r} for {element}") from None


def build(source: Path, out: Path) -> dict[str, list[dict[str, str]]]:
    for name, digest in KNOWN_SHA256.items():
        path = source / name
        if path.is_file() and _sha256(path) != digest:
            print(f"note: {path} differs from the version recorded in SOURCES.md "
                  f"(sha256 {_sha256(path)}); update SOURCES.md", file=sys.stderr)

    src_lines = source / LINES_FILE
    rows = _read_csv(src_lines, ["species", "ion", "wavelength_air_nm", "wavelength_vac_nm",
                                 "A_ki_s", "E_upper_eV", "E_lower_eV", "g_upper", "g_lower",
                                 "acc", "type", "conf_lower", "term_lower", "J_lower",
                                 "conf_upper", "term_upper", "J_upper", "tp_ref"])
    lines = []
    for r in rows:
        out_row = dict(r)
        out_row["element"] = r["species"]
        out_row["species"] = _species(r["species"], r["ion"], src_lines)
        out_row["multiplet"] = multiplet_label(r)
        out_row["group"] = ""
        lines.append(out_row)
    lines.sort(key=lambda r: (float(r["wavelength_air_nm"]), r["species"], r["type"]))
    members = assign_groups(lines)

    src_levels = source / LEVELS_FILE
    levels = []
    for r in _read_csv(src_levels, ["species", "ion", "E_eV", "g"]):
        levels.append({"species": _species(r["species"], r["ion"], src_levels),
                       "element": r["species"], "ion": r["ion"], "E_eV": r["E_eV"], "g": r["g"]})

    src_ie = source / IONIZATION_FILE
    ionization = []
    for r in _read_csv(src_ie, ["species", "ion", "ionization_energy_eV"]):
        ionization.append({"species": _species(r["species"], r["ion"], src_ie),
                           "element": r["species"], "ion": r["ion"],
                           "ionization_energy_eV": r["ionization_energy_eV"]})

    _write_csv(out / "lines.csv", LINE_COLUMNS, lines)
    _write_csv(out / "levels.csv", ["species", "element", "ion", "E_eV", "g"], levels)
    _write_csv(out / "ionization_energies.csv",
               ["species", "element", "ion", "ionization_energy_eV"], ionization)
    print(f"wrote {len(lines)} lines, {len(levels)} levels, {len(ionization)} ionization "
          f"energies to {out}")
    for name, chosen in members.items():
        print(f"group {name}: {chosen[0]['species']} {chosen[0]['multiplet']}: "
              + ", ".join(f"{float(r['wavelength_air_nm']):.3f}" for r in chosen))
    return members


def main(argv: list[str] | None = None) -> int:
    here = Path(__file__).resolve().parent
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("source", nargs="?", type=Path,
                        default=here.parent.parent / "shared" / "data",
                        help="folder with the shared NIST ASD extracts (default: ../shared/data)")
    parser.add_argument("--out", type=Path, default=here / "atomic",
                        help="output folder (default: calibration/atomic)")
    args = parser.parse_args(argv)
    build(args.source, args.out)
    return 0


if __name__ == "__main__":
    sys.exit(main())
