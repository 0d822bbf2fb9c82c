"""User simulation suites (``suite.kind: files``): find every snapshot of every model.

Each model names its files with one pattern, ``suite.models.<name>.snapshots``: a glob
(``sims/fid/snapdir_*/snap_*.hdf5``, ``**`` for any depth) or a pattern with
``{index}`` standing for the snapshot number (``sims/fid/snap_{index}.*``; every
``{index}`` in one path must be the same digits). Relative patterns are relative to
the working directory. The files are grouped into snapshots by their headers: files
with the same redshift belong to one snapshot, which must then hold exactly the
header's number of files (``NumFilesPerSnapshot`` / ``num_files``) with agreeing
headers. Snapshots are numbered 000, 001, ... in increasing redshift.

Every problem is a one-line :class:`~raytrace.errors.RaytraceError` that names the
configuration key and the file: a pattern that matches nothing, formats mixed within
a model, headers that disagree or a file missing from a snapshot, box sides that differ
between snapshots or models, a requested species a snapshot does not hold.
"""

from __future__ import annotations

import glob
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

from . import config as rc
from .errors import RaytraceError
from .snapshots import FileSummary, detect_format, file_number, file_summary, read_header

_INDEX = re.compile(r"\{index(?::[^}]*)?\}")


@dataclass(frozen=True)
class Snapshot:
    """One snapshot of a user suite: its files in file-number order and what slicing needs."""

    files: tuple[str, ...]
    redshift: float
    fmt: str
    box_mpc_h: float
    n_total: dict[int, int] = field(hash=False, compare=False)


@dataclass
class FileSuite:
    """Every model's snapshots, in increasing redshift, and the common box side."""

    models: dict[str, list[Snapshot]]
    box_mpc_h: float

    def indices(self, model: str) -> list[str]:
        return [f"{i:03d}" for i in range(len(self.models[model]))]

    def snapshot(self, model: str, index: str | int) -> Snapshot:
        return self.models[model][int(index)]


def expand_pattern(pattern: str, where: str) -> list[Path]:
    """The files a glob or ``{index}`` pattern lists, in name order."""
    if not pattern.strip():
        raise RaytraceError(f"{where}: empty pattern")
    pattern = os.path.expanduser(pattern)
    as_glob = _INDEX.sub("*", pattern)
    found = sorted(p for p in glob.glob(as_glob, recursive=True) if os.path.isfile(p) and not p.endswith(".tmp"))
    if _INDEX.search(pattern):
        regex = _index_regex(pattern)
        kept = []
        for p in found:
            m = regex.fullmatch(p)
            if m is not None and len(set(m.groups())) == 1:
                kept.append(p)
        found = kept
    if not found:
        raise RaytraceError(f"{where}: pattern {pattern!r} matches no file (relative to {os.getcwd()})")
    return [Path(p) for p in found]


def _index_regex(pattern: str) -> re.Pattern:
    """``{index}`` as a run of digits, the rest of the pattern as a glob."""
    parts = _INDEX.split(pattern)
    body = r"(\d+)".join(_glob_to_regex(part) for part in parts)
    return re.compile(body)


def _glob_to_regex(text: str) -> str:
    out, i = [], 0
    while i < len(text):
        c = text[i]
        if text.startswith("**", i):
            out.append(".*")
            i += 2
            continue
        if c == "*":
            out.append("[^/]*")
        elif c == "?":
            out.append("[^/]")
        elif c == "[":
            j = text.find("]", i + 1)
            if j < 0:
                out.append(re.escape(c))
            else:
                inner = text[i + 1 : j]
                out.append("[" + ("^" + inner[1:] if inner.startswith("!") else inner) + "]")
                i = j
        else:
            out.append(re.escape(c))
        i += 1
    return "".join(out)


def _index_of(pattern: str, path: Path) -> str | None:
    if not _INDEX.search(pattern):
        return None
    m = _index_regex(os.path.expanduser(pattern)).fullmatch(str(path))
    return m.group(1) if m else None


def _file_order(path: Path):
    numbered = file_number(path)
    return (numbered[0], numbered[1]) if numbered else (path.name, -1)


def model_snapshots(
    name: str, model: Mapping, species: Sequence[int], where: str | None = None
) -> list[Snapshot]:
    """Find, group and check the snapshots of one files model; increasing redshift."""
    key = where or f"suite.models.{name}"
    pattern = model["snapshots"]
    files = expand_pattern(pattern, f"{key}.snapshots")
    fmt = model.get("format", "auto")

    def prefixed(fn, *args):
        try:
            return fn(*args)
        except RaytraceError as exc:
            raise RaytraceError(f"{key}.snapshots: {exc}") from None

    detected = {f: prefixed(detect_format, f) for f in files}
    kinds = sorted(set(detected.values()))
    if fmt == "auto":
        if len(kinds) > 1:
            example = {k: next(str(f) for f, v in detected.items() if v == k) for k in kinds}
            raise RaytraceError(
                f"{key}.snapshots: the pattern mixes formats ("
                + ", ".join(f"{v} is {k}" for k, v in example.items())
                + f"); narrow {pattern!r} or give {key}.format"
            )
        fmt = kinds[0]
    else:
        wrong = next((f for f, v in detected.items() if v != fmt), None)
        if wrong is not None:
            raise RaytraceError(f"{key}.format: {fmt} but {wrong} is a {detected[wrong]} snapshot")
    length_unit = model.get("length_unit")
    if fmt == "legacy-binary" and length_unit is None:
        raise RaytraceError(
            f"{key}.length_unit: required for legacy-binary snapshots, whose headers carry no unit (kpc/h or Mpc/h)"
        )

    summaries: list[FileSummary] = [prefixed(file_summary, f, fmt, length_unit) for f in files]
    groups: dict[float, list[FileSummary]] = {}
    for s in summaries:
        groups.setdefault(s.redshift, []).append(s)
    if _INDEX.search(pattern):
        _check_index_matches_header(key, pattern, groups)
    snapshots = []
    for z in sorted(groups):
        members = sorted(groups[z], key=lambda s: _file_order(s.path))
        paths = [s.path for s in members]
        header = prefixed(read_header, paths, fmt, length_unit)  # every header against the data
        for t in species:
            if header.n_total.get(t, 0) == 0:
                raise RaytraceError(
                    f"{key}.species: snapshot {paths[0]} (z = {z:g}) holds no particles of species {t} "
                    f"(it holds species {', '.join(map(str, sorted(header.n_total))) or 'none'})"
                )
        snapshots.append(Snapshot(tuple(str(p) for p in header.files), z, fmt, header.box_mpc_h, header.n_total))
    return snapshots


def _check_index_matches_header(key: str, pattern: str, groups: dict[float, list[FileSummary]]) -> None:
    """With ``{index}``, the snapshot number in the names and the header's redshift must agree."""
    z_of_index: dict[str, tuple[float, Path]] = {}
    for z, members in groups.items():
        indices = {}
        for s in members:
            idx = _index_of(pattern, s.path)
            indices.setdefault(idx, s.path)
            if idx in z_of_index and z_of_index[idx][0] != z:
                other_z, other = z_of_index[idx]
                raise RaytraceError(
                    f"{key}.snapshots: {s.path} has redshift {z:g} but {other} of the same snapshot number "
                    f"{idx} has {other_z:g} (headers disagree)"
                )
            z_of_index[idx] = (z, s.path)
        if len(indices) > 1:
            (a, pa), (b, pb) = list(indices.items())[:2]
            raise RaytraceError(
                f"{key}.snapshots: {pa} (snapshot number {a}) and {pb} (number {b}) have the same redshift {z:g}"
            )


def discover(cfg: dict) -> FileSuite:
    """Every model's snapshots; checks the common box, the slab thickness and the sources.

    Fills ``survey.sources.z_max`` (default: the lowest of the models' highest snapshot
    redshifts) in ``cfg``.
    """
    if cfg["suite"]["kind"] != "files":
        raise RaytraceError("suite.kind: not a files suite")
    models: dict[str, list[Snapshot]] = {}
    first: tuple[float, str, str] | None = None
    for name, model in cfg["suite"]["models"].items():
        snaps = model_snapshots(name, model, rc.model_species(cfg, name))
        for s in snaps:
            if first is None:
                first = (s.box_mpc_h, name, s.files[0])
            elif abs(s.box_mpc_h / first[0] - 1) > 1e-6:
                raise RaytraceError(
                    f"suite.models.{name}.snapshots: {s.files[0]} has a box side of {s.box_mpc_h:g} Mpc/h but "
                    f"{first[2]} (model {first[1]}) has {first[0]:g}: every snapshot of a suite shares one box"
                )
        models[name] = snaps
    assert first is not None
    box, t = first[0], float(cfg["planes"]["thickness_mpc_h"])
    n_slabs = box / t
    if abs(n_slabs - round(n_slabs)) > 1e-6 or round(n_slabs) < 1:
        raise RaytraceError(f"planes.thickness_mpc_h: {t} does not divide the snapshots' box side {box:g} Mpc/h")
    z_top = min(max(s.redshift for s in snaps) for snaps in models.values())
    rc.check_source_range(cfg, z_top)
    return FileSuite(models, box)
