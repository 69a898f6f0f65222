"""`cubecast batch --compare RUN_A RUN_B`: two runs of one campaign (two --out folders of `cubecast batch`,
e.g. two CFAR settings) judged capture by capture: the points gained and lost, and how far the points
both runs found moved in range, velocity and azimuth.

Matching rule (README "Batch"): captures are paired by name (the capture's file stem, from the record
beside each output); points only within the same frame (the record's `frame` field). For points a of
RUN_A and b of RUN_B, each coordinate k of range_m, velocity_mps, azimuth_deg is scaled by
    s_k = max(sqrt(sigma_a,k^2 + sigma_b,k^2), resolution_k / 2)
(the points' own sigmas, at least half the sensor's resolution cell: range c / 2B, velocity, and the
array's Rayleigh azimuth resolution at boresight, recorded with each output), and
    d^2 = sum_k ((b_k - a_k) / s_k)^2.
Pairs with d <= gate are candidates; the closest pairs are matched first (global nearest neighbour,
greedy, ties by point order), each point at most once. A point of B without a match is gained, one of
A lost. Shifts are b - a of matched points: mean, RMS and largest magnitude per coordinate.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from .batchplan import RECORD_KIND, RECORD_SUFFIX
from .errors import CubecastError
from .wire import RECORD_DTYPE

COORDS = (("range_m", "sigma_range_m", "range_resolution_m"),
          ("velocity_mps", "sigma_velocity_mps", "velocity_resolution_mps"),
          ("azimuth_deg", "sigma_azimuth_deg", "azimuth_resolution_deg"))
READABLE = ("csv", "npz")


def read_run(folder: Path) -> dict[str, tuple[dict, Path]]:
    """{capture name: (record, output path)} of every output of a batch run folder."""
    if not folder.is_dir():
        raise CubecastError(f"--compare {folder}: not a folder")
    found: dict[str, tuple[dict, Path]] = {}
    for rec_path in sorted(folder.glob("*" + RECORD_SUFFIX)):
        try:
            doc = json.loads(rec_path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise CubecastError(f"--compare {folder}: {rec_path.name}: not readable: {exc}") from None
        if not isinstance(doc, dict) or doc.get("kind") != RECORD_KIND:
            continue
        out = rec_path.with_name(rec_path.name[: -len(RECORD_SUFFIX)])
        if out.exists():
            found[str(doc.get("name", out.stem))] = (doc, out)
    if not found:
        raise CubecastError(f"--compare {folder}: no outputs of cubecast batch in it (no NAME{RECORD_SUFFIX})")
    return found


def read_points(path: Path, fmt: str) -> np.ndarray:
    """The points of a csv or npz output as RECORD_DTYPE records (every field the file has)."""
    if fmt not in READABLE:
        raise CubecastError(f"{path}: --compare reads {' and '.join(READABLE)} outputs, this run wrote {fmt}; "
                            "run the campaign with --format npz (exact) or csv")
    if fmt == "npz":
        with np.load(path) as z:
            missing = [n for n in RECORD_DTYPE.names if n not in z.files]
            if missing:
                raise CubecastError(f"{path}: no member {missing[0]}.npy")
            n = z["frame"].shape[0]
            out = np.empty(n, RECORD_DTYPE)
            for name in RECORD_DTYPE.names:
                out[name] = z[name]
        return out
    with open(path, encoding="utf-8") as f:
        header = f.readline().rstrip("\n").split(",")
        if header != list(RECORD_DTYPE.names):
            raise CubecastError(f"{path}: the columns are not the point record's ({','.join(RECORD_DTYPE.names)})")
        lines = f.read().splitlines()
    if not lines:
        return np.empty(0, RECORD_DTYPE)
    try:
        return np.loadtxt(lines, delimiter=",", dtype=RECORD_DTYPE, ndmin=1)
    except ValueError as exc:
        raise CubecastError(f"{path}: not a point file of cubecast: {exc}") from None


def match_frame(a: np.ndarray, b: np.ndarray, floors: tuple[float, ...], gate: float) -> tuple[np.ndarray, np.ndarray]:
    """Indexes (into a, into b) of the matched pairs of one frame, by the module's rule."""
    if len(a) == 0 or len(b) == 0:
        return np.empty(0, np.intp), np.empty(0, np.intp)
    d2 = np.zeros((len(a), len(b)))
    for (value, sigma, _), floor in zip(COORDS, floors):
        va, vb = a[value].astype(np.float64), b[value].astype(np.float64)
        sa, sb = a[sigma].astype(np.float64), b[sigma].astype(np.float64)
        scale = np.fmax(np.sqrt(sa[:, None] ** 2 + sb[None, :] ** 2), floor / 2.0)  # a NaN sigma: the floor
        d2 += ((vb[None, :] - va[:, None]) / scale) ** 2
    ia, ib = np.nonzero(d2 <= gate * gate)  # a NaN distance is never a candidate
    order = np.lexsort((ib, ia, d2[ia, ib]))
    used_a, used_b = set(), set()
    pairs = []
    for i, j in zip(ia[order], ib[order]):
        if i not in used_a and j not in used_b:
            used_a.add(i)
            used_b.add(j)
            pairs.append((i, j))
    pairs.sort()
    return (np.array([p[0] for p in pairs], np.intp), np.array([p[1] for p in pairs], np.intp))


class Shifts:
    """Sums of b - a per coordinate, for the mean, RMS and largest magnitude."""

    def __init__(self):
        self.n = 0
        self.sum = np.zeros(len(COORDS))
        self.sq = np.zeros(len(COORDS))
        self.max = np.zeros(len(COORDS))

    def add(self, diffs: np.ndarray) -> None:  # [n, coords]
        if len(diffs):
            self.n += len(diffs)
            self.sum += diffs.sum(axis=0)
            self.sq += (diffs ** 2).sum(axis=0)
            self.max = np.maximum(self.max, np.abs(diffs).max(axis=0))

    def merge(self, other: "Shifts") -> None:
        self.n += other.n
        self.sum += other.sum
        self.sq += other.sq
        self.max = np.maximum(self.max, other.max)

    def summary(self) -> dict:
        out = {}
        for k, (name, _, _) in enumerate(COORDS):
            if self.n:
                out[name] = {"mean": float(self.sum[k] / self.n), "rms": float(np.sqrt(self.sq[k] / self.n)),
                             "max_abs": float(self.max[k])}
            else:
                out[name] = {"mean": None, "rms": None, "max_abs": None}
        return out


def compare_points(a: np.ndarray, b: np.ndarray, floors: tuple[float, ...], gate: float) -> tuple[dict, Shifts]:
    shifts = Shifts()
    matched = 0
    for frame in np.union1d(a["frame"], b["frame"]):
        fa, fb = a[a["frame"] == frame], b[b["frame"] == frame]
        ia, ib = match_frame(fa, fb, floors, gate)
        matched += len(ia)
        if len(ia):
            shifts.add(np.stack([fb[v][ib].astype(np.float64) - fa[v][ia].astype(np.float64)
                                 for v, _, _ in COORDS], axis=1))
    counts = {"points_a": int(len(a)), "points_b": int(len(b)), "matched": matched,
              "gained": int(len(b)) - matched, "lost": int(len(a)) - matched}
    return counts, shifts


def _floors(doc: dict) -> tuple[float, ...]:
    fig = doc.get("sensor") or {}
    return tuple(float(fig.get(res) or 0.0) for _, _, res in COORDS)


def compare_runs(run_a: Path, run_b: Path, gate: float = 2.0) -> dict:
    """The comparison as one JSON-able dict: per capture and for the campaign."""
    if not gate > 0:
        raise CubecastError(f"--gate {gate}: must be above 0")
    a, b = read_run(run_a), read_run(run_b)
    rows, total, campaign = [], {"points_a": 0, "points_b": 0, "matched": 0, "gained": 0, "lost": 0}, Shifts()
    differs = []
    for name in sorted(set(a) & set(b)):
        (doc_a, out_a), (doc_b, out_b) = a[name], b[name]
        if doc_a.get("inputs", {}).get("capture") != doc_b.get("inputs", {}).get("capture"):
            differs.append(name)
            continue
        floors = _floors(doc_a)
        counts, shifts = compare_points(read_points(out_a, doc_a.get("format")),
                                        read_points(out_b, doc_b.get("format")), floors, gate)
        for k in total:
            total[k] += counts[k]
        campaign.merge(shifts)
        rows.append({"name": name, "capture": doc_a.get("capture"), **counts, "shift": shifts.summary(),
                     "scale_floors": dict(zip((c[0] for c in COORDS), (f / 2.0 for f in floors)))})
    return {"run_a": str(run_a), "run_b": str(run_b), "gate": gate, "captures": rows,
            "total": {"captures": len(rows), **total, "shift": campaign.summary()},
            "only_in_a": sorted(set(a) - set(b)), "only_in_b": sorted(set(b) - set(a)),
            "different_captures": differs}


def _shift_text(s: dict) -> str:
    return "-" if s["mean"] is None else f"{s['mean']:+.4g}/{s['rms']:.4g}"


def format_comparison(result: dict) -> str:
    head = ("capture", "A", "B", "matched", "gained", "lost", "range_m mean/rms", "velocity_mps mean/rms",
            "azimuth_deg mean/rms")
    table = [head]
    for r in result["captures"] + [dict(result["total"], name="total")]:
        table.append((r["name"], str(r["points_a"]), str(r["points_b"]), str(r["matched"]), str(r["gained"]),
                      str(r["lost"]), *(_shift_text(r["shift"][c[0]]) for c in COORDS)))
    widths = [max(len(row[i]) for row in table) for i in range(len(head))]
    lines = [f"A = {result['run_a']}, B = {result['run_b']}; gate {result['gate']:g}; shifts are B - A of "
             "matched points"]
    lines += ["  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(row, widths)))
              for row in table]
    for key, what in (("only_in_a", "only in A"), ("only_in_b", "only in B"),
                      ("different_captures", "not compared, the captures differ")):
        if result[key]:
            lines.append(f"{what}: {', '.join(result[key])}")
    return "\n".join(lines)
