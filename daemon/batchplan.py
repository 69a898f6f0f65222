"""`cubecast batch`, the driver's plan: which captures, where each output goes, the digest of its
inputs, whether an output is up to date, and the record beside each output (OUT.batch.json).

Digest rule (README "Batch"): SHA-256 of a JSON object of
  capture      SHA-256 of the capture file's bytes,
  settings     the effective [processing] values (defaults filled in, so a comment or a field given
               at its default value changes nothing),
  calibration  SHA-256 of the calibration file's bytes, or null,
  format, skip_corrupt, and
  code         batchwork.code_digest(): every cubecast.daemon module, numpy, scipy, numba versions,
               and the version of each library the format's writer uses.
An output is up to date when it exists and its record holds the same digest; anything else is
processed again and replaced.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import glob
import hashlib
import json
import logging
import os
import shutil
from dataclasses import dataclass, field
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path

from . import exports
from .errors import CubecastError

log = logging.getLogger(__name__)

RECORD_SUFFIX = ".batch.json"
RECORD_KIND = "cubecast batch output"
RECORD_VERSION = 1
OLD_SUFFIX = ".batch-old"  # a folder output being replaced waits under .NAME.batch-old
FORMAT_DISTRIBUTIONS = {"pcd": ("pypcd4",), "ply": ("plyfile",), "mcap": ("mcap", "mcap-ros2-support", "rosbags"),
                        "rosbag": ("rosbags",)}
HASH_BLOCK_BYTES = 1 << 20


def file_sha256(path: str | Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        while block := f.read(HASH_BLOCK_BYTES):
            digest.update(block)
    return digest.hexdigest()


def find_captures(items: list[str]) -> list[Path]:
    """The captures named (files as given; a folder: its *.cap files, sorted by name), each once."""
    found: list[Path] = []
    for item in items:
        p = Path(item)
        if p.is_dir():
            caps = sorted(q for q in p.glob("*.cap") if q.is_file())
            if not caps:
                raise CubecastError(f"{item}: a folder without .cap files")
            found += caps
        elif p.exists():
            found.append(p)
        else:
            raise CubecastError(f"capture {item}: no such file or folder")
    seen: set[Path] = set()
    out = []
    for p in found:
        key = p.resolve()
        if key not in seen:
            seen.add(key)
            out.append(p)
    return out


def output_name(capture: Path, fmt: str) -> str:
    """STEM.csv, STEM.npz, STEM.mcap; the folder formats STEM_pcd, STEM_ply, STEM_rosbag."""
    return f"{capture.stem}_{fmt}" if fmt in exports.FOLDER_FORMATS else f"{capture.stem}.{fmt}"


def check_names(captures: list[Path], fmt: str) -> None:
    """Two captures whose outputs would share a name: an error naming both, before any work."""
    by_name: dict[str, Path] = {}
    for c in captures:
        name = output_name(c, fmt)
        if name in by_name:
            raise CubecastError(f"captures {by_name[name]} and {c} would both be written to {name}: rename one "
                                "or run them into different --out folders")
        by_name[name] = c


def code_inputs(fmt: str) -> str:
    from .batchwork import code_digest
    libs = []
    for dist in FORMAT_DISTRIBUTIONS.get(fmt, ()):
        try:
            libs.append(f"{dist} {version(dist)}")
        except PackageNotFoundError:
            libs.append(f"{dist} missing")
    return hashlib.sha256((code_digest() + "\0" + "\0".join(libs)).encode()).hexdigest()


def input_digests(capture_sha256: str, settings, calibration_sha256: str | None, fmt: str, skip_corrupt: bool,
                  code_sha256: str) -> dict:
    """The digest rule's parts and the digest itself ("digest")."""
    parts = {"capture": capture_sha256, "settings": dataclasses.asdict(settings), "calibration": calibration_sha256,
             "format": fmt, "skip_corrupt": bool(skip_corrupt), "code": code_sha256}
    text = json.dumps(parts, sort_keys=True, allow_nan=False)
    return {**parts, "digest": hashlib.sha256(text.encode()).hexdigest()}


def record_path(out: Path) -> Path:
    return out.with_name(out.name + RECORD_SUFFIX)


def read_record(out: Path) -> dict | None:
    """The record beside an output, or None (missing, unreadable or not one of ours)."""
    try:
        doc = json.loads(record_path(out).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(doc, dict) or doc.get("kind") != RECORD_KIND:
        return None
    return doc


def why_stale(out: Path, inputs: dict) -> str | None:
    """None when the output is up to date, else why it is processed (again)."""
    if not (out.exists() or out.is_symlink()):
        return "no output yet"
    doc = read_record(out)
    if doc is None:
        return f"no readable {record_path(out).name} beside the output"
    old = doc.get("inputs", {})
    if old.get("digest") == inputs["digest"]:
        return None
    changed = [k for k in ("capture", "settings", "calibration", "format", "skip_corrupt", "code")
               if old.get(k) != inputs[k]]
    return f"{', '.join(changed) or 'digest'} changed"


def write_record(out: Path, doc: dict) -> None:
    """The record, written under a temporary name and renamed into place (after the output)."""
    path = record_path(out)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.part")
    tmp.write_text(json.dumps({"kind": RECORD_KIND, "version": RECORD_VERSION,
                               "written_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
                               **doc}, indent=1, allow_nan=False) + "\n", encoding="utf-8")
    os.replace(tmp, path)


def sensor_figures(sensor) -> dict:
    """The resolutions --compare scales its gate by, recorded with each output."""
    return {"sensor_id": sensor.sensor_id, "range_resolution_m": sensor.range_resolution_m,
            "velocity_resolution_mps": sensor.velocity_resolution_mps,
            "azimuth_resolution_deg": sensor.virtual_array()["azimuth_resolution_deg"]}


@dataclass
class Placement:
    """Replacing an output, at the end of its capture (so a capture that fails leaves the folder as it
    was): its record goes first (a stopped run leaves no record vouching for an old output), then
    PointWriter renames a file over the old one; a folder output moves aside under .NAME.batch-old until
    the new one is in place, and comes back if that fails."""
    out: Path
    folder: bool
    aside: Path | None = field(default=None)

    def clean(self) -> None:
        """Remove what a batch stopped while writing this output left (its temporary names)."""
        for left in self.out.parent.glob(f".{glob.escape(self.out.name)}.*.part"):
            shutil.rmtree(left, ignore_errors=True) if left.is_dir() else left.unlink(missing_ok=True)
        old = self.out.with_name(f".{self.out.name}{OLD_SUFFIX}")
        if old.exists():
            shutil.rmtree(old) if (self.out.exists() or self.out.is_symlink()) else os.replace(old, self.out)

    def commit(self) -> None:
        """Just before the writer renames the new output into place."""
        record_path(self.out).unlink(missing_ok=True)
        if self.folder and (self.out.exists() or self.out.is_symlink()):
            self.aside = self.out.with_name(f".{self.out.name}{OLD_SUFFIX}")
            os.replace(self.out, self.aside)

    def done(self) -> None:
        if self.aside is not None:
            shutil.rmtree(self.aside, ignore_errors=True)
            self.aside = None

    def failed(self) -> None:
        if self.aside is not None and not (self.out.exists() or self.out.is_symlink()):
            os.replace(self.aside, self.out)
        self.aside = None
