"""Checks of builder arguments and small geometry helpers shared by the builders.

In: builder arguments and points in µm. Out: validated values (an ``InputError`` naming the
argument otherwise), unit vectors, sampled polylines, node and segment records.
"""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np

from ..errors import InputError

#: Largest distance between consecutive polyline points of every builder (µm).
MAX_STEP_UM = 0.5

NODE_KINDS = ("junction", "blind", "border", "loop")


# --------------------------------------------------------------------------- checks


def _bad(name: str, expected: str, got: Any) -> InputError:
    return InputError(f"expected {expected}, got {got!r}", param=name)


def _real(
    name: str,
    value: Any,
    *,
    low: float | None = None,
    low_open: bool = False,
    high: float | None = None,
    high_open: bool = False,
) -> float:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise _bad(name, "a number", value)
    v = float(value)
    if not math.isfinite(v):
        raise _bad(name, "a finite number", value)
    if low is not None and (v < low or (low_open and v == low)):
        raise _bad(name, f"a number {'>' if low_open else '>='} {low:g}", value)
    if high is not None and (v > high or (high_open and v == high)):
        raise _bad(name, f"a number {'<' if high_open else '<='} {high:g}", value)
    return v


def _positive(name: str, value: Any) -> float:
    return _real(name, value, low=0.0, low_open=True)


def _count(name: str, value: Any, *, low: int = 0, high: int | None = None) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise _bad(name, "an integer", value)
    v = int(value)
    if v < low or (high is not None and v > high):
        rng = f">= {low}" if high is None else f"in [{low}, {high}]"
        raise _bad(name, f"an integer {rng}", value)
    return v


def _vec3(name: str, value: Any, *, positive: bool = False, nonzero: bool = False) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise _bad(name, "three numbers (z, y, x)", value) from None
    if arr.shape != (3,):
        raise _bad(name, "three numbers (z, y, x)", value)
    if not np.all(np.isfinite(arr)):
        raise _bad(name, "three finite numbers", value)
    if positive and not np.all(arr > 0):
        raise _bad(name, "three numbers > 0", value)
    if nonzero and not np.any(arr != 0):
        raise _bad(name, "a non-zero vector", value)
    return arr


def _spacing(spacing: Any) -> np.ndarray:
    return _vec3("spacing", spacing, positive=True)


def _choice(name: str, value: Any, choices: Sequence[str]) -> str:
    if value not in choices:
        raise _bad(name, "one of " + ", ".join(repr(c) for c in choices), value)
    return value


def _rng(seed: Any) -> np.random.Generator:
    if seed is not None and (
        isinstance(seed, (bool, np.bool_)) or not isinstance(seed, (int, np.integer)) or seed < 0
    ):
        raise _bad("seed", "None or an integer >= 0", seed)
    return np.random.default_rng(seed)


# ------------------------------------------------------------------------- geometry


def _unit(v: np.ndarray) -> np.ndarray:
    v = np.asarray(v, dtype=float)
    return v / np.linalg.norm(v)


def _any_perpendicular(d: np.ndarray) -> np.ndarray:
    # Cross with the axis least aligned with d so the result is well conditioned.
    ref = np.zeros(3)
    ref[int(np.argmin(np.abs(d)))] = 1.0
    return _unit(np.cross(d, ref))


def _rotate(v: np.ndarray, axis: np.ndarray, angle_rad: float) -> np.ndarray:
    """Rodrigues rotation of ``v`` about unit ``axis``."""
    c, s = math.cos(angle_rad), math.sin(angle_rad)
    return v * c + np.cross(axis, v) * s + axis * np.dot(axis, v) * (1.0 - c)


def _polyline_length(points: np.ndarray) -> float:
    return float(np.sum(np.linalg.norm(np.diff(points, axis=0), axis=1)))


def _n_steps(length_um: float) -> int:
    return max(1, int(math.ceil(length_um / MAX_STEP_UM - 1e-9)))


def _line_points(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    n = _n_steps(float(np.linalg.norm(b - a)))
    t = np.linspace(0.0, 1.0, n + 1)[:, None]
    pts = a + t * (b - a)
    pts[0], pts[-1] = a, b
    return pts


def _wiggled_points(
    a: np.ndarray, b: np.ndarray, amplitude_um: float, e_perp: np.ndarray, half_waves: int
) -> np.ndarray:
    """Chord a->b displaced sideways by ``amplitude * sin(pi t) * sin(pi m t)``.

    The ``sin(pi t)`` envelope keeps the ends in place and their tangents along
    the chord, so branching angles at junctions stay as designed and tubes
    meeting at a node do not lean towards each other. The arc is at most chord
    + total variation of the displacement (<= 2 m amplitude), which sets a
    sample count that keeps every step below ``MAX_STEP_UM``.
    """
    chord = float(np.linalg.norm(b - a))
    n = _n_steps(chord + 2.0 * half_waves * abs(amplitude_um))
    t = np.linspace(0.0, 1.0, n + 1)[:, None]
    pts = a + t * (b - a) + amplitude_um * np.sin(np.pi * t) * np.sin(np.pi * half_waves * t) * e_perp
    pts[0], pts[-1] = a, b
    return pts


def _make_segment(
    seg_id: int,
    node_from: dict,
    node_to: dict,
    points: np.ndarray,
    radii: float | np.ndarray,
    *,
    length_um: float | None = None,
    **extra: Any,
) -> dict:
    pts = np.array(points, dtype=float)
    # Shared nodes must be bit-identical with the polyline ends.
    pts[0] = node_from["pos_um"]
    pts[-1] = node_to["pos_um"]
    rad = np.broadcast_to(np.asarray(radii, dtype=float), (len(pts),)).copy()
    seg = {
        "id": int(seg_id),
        "node_from": int(node_from["id"]),
        "node_to": int(node_to["id"]),
        "points_um": pts,
        "radii_um": rad,
    }
    if length_um is not None:
        seg["length_um"] = float(length_um)
    seg.update(extra)
    return seg


def _nominal_radius(points: np.ndarray, radii: np.ndarray) -> float:
    if np.all(radii == radii[0]):
        return float(radii[0])
    w = np.linalg.norm(np.diff(points, axis=0), axis=1)
    mid = 0.5 * (radii[1:] + radii[:-1])
    return float(np.sum(w * mid) / np.sum(w)) if np.sum(w) > 0 else float(np.mean(radii))


def _node(node_id: int, pos: Sequence[float], kind: str) -> dict:
    return {"id": int(node_id), "pos_um": tuple(float(c) for c in pos), "kind": kind}


# --------------------------------------------------------------------------- network


def _jsonable(obj: Any) -> Any:
    """Copy of ``obj`` with numpy arrays and scalars turned into Python types."""
    t = type(obj)
    if t in (str, int, float, bool) or obj is None:
        return obj
    if isinstance(obj, np.ndarray):
        # tolist() already yields Python scalars; walking them again is the slow part.
        return obj.tolist() if obj.dtype != object else [_jsonable(v) for v in obj]
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.generic):
        return obj.item()
    return obj


def _json_default(obj: Any) -> Any:
    if isinstance(obj, (np.ndarray, np.generic)):
        return obj.tolist()
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")
