"""The one check of a run checkpoint (kind ``gridbias.openmm-run``, written by ``BiasLink.save``) before
anything uses it: every field's type and range, every array's dtype and shape against the metadata,
finite MD state. The bias inside is checked by ``GridBias.from_state``."""

from __future__ import annotations

import math

import numpy as np

from .errors import CheckpointError

__all__ = ["CHECKPOINT_KIND", "CHECKPOINT_VERSION", "check_run_checkpoint"]

#: The ``kind`` of a run checkpoint written by ``BiasLink.save`` (gridbias.checkpoint container).
CHECKPOINT_KIND = "gridbias.openmm-run"
CHECKPOINT_VERSION = 1

_MAX_PARTICLES = 10**9
_MAX_STEP = 2**62
_FIELDS = {"version", "bias", "cvs", "labels", "n_particles", "platform", "openmm_version", "step", "time_ps",
           "engine", "written"}
_ENGINE_FIELDS = {"route", "pending_hills", "n_folded", "n_pending", "name"}
_MD_ARRAYS = ("md.checkpoint", "md.positions", "md.velocities", "md.box")


def _fail(path, text):
    raise CheckpointError(f"run checkpoint {path!r}: {text}")


def _int(path, where, value, low, high):
    if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
        _fail(path, f"{where} must be an integer in {low}..{high}, got {str(value)[:60]!r}")
    return value


def _str(path, where, value, limit=200):
    if not isinstance(value, str) or len(value) > limit:
        _fail(path, f"{where} must be a text of at most {limit} characters")
    return value


def check_run_checkpoint(path: str, meta: dict, arrays: dict) -> dict:
    """Check a run checkpoint's metadata and arrays; return its parts.

    Returns
    -------
    dict with ``bias_meta``, ``bias_arrays`` (the bias state, for ``GridBias.from_state``), ``cvs``,
    ``labels``, ``n_particles``, ``step``, ``time_ps``, ``platform``, ``folded`` (grid shape), ``n_folded``.

    Raises
    ------
    CheckpointError
        Naming the path and the first field that is missing, of the wrong type or out of range.
    """
    missing = _FIELDS - set(meta)
    if missing:
        _fail(path, f"the checkpoint is incomplete (missing {sorted(missing)})")
    version = _int(path, "version", meta["version"], 1, 2**31)
    if version > CHECKPOINT_VERSION:
        _fail(path, f"written by a newer gridbias (format {version}); upgrade")
    bias_meta = meta["bias"]
    if not isinstance(bias_meta, dict):
        _fail(path, "bias must be a bias state (a dict)")
    cvs, labels = meta["cvs"], meta["labels"]
    if not isinstance(cvs, list) or not all(isinstance(c, dict) for c in cvs) or not 1 <= len(cvs) <= 3:
        _fail(path, "cvs must be a list of 1 to 3 CV descriptions")
    if not isinstance(labels, list) or len(labels) != len(cvs):
        _fail(path, f"labels must be a list of {len(cvs)} names")
    for label in labels:
        _str(path, "labels", label, 200)
    n_particles = _int(path, "n_particles", meta["n_particles"], 1, _MAX_PARTICLES)
    step = _int(path, "step", meta["step"], 0, _MAX_STEP)
    time_ps = meta["time_ps"]
    if isinstance(time_ps, bool) or not isinstance(time_ps, (int, float)) or not math.isfinite(time_ps):
        _fail(path, f"time_ps must be a finite number, got {str(time_ps)[:60]!r}")
    for key in ("platform", "openmm_version", "written"):
        _str(path, key, meta[key])
    engine = meta["engine"]
    if not isinstance(engine, dict) or set(engine) != _ENGINE_FIELDS:
        _fail(path, f"engine must hold {sorted(_ENGINE_FIELDS)}")
    _str(path, "engine route", engine["route"])
    _str(path, "engine name", engine["name"])
    pending = _int(path, "engine pending_hills", engine["pending_hills"], 0, 2**31)
    n_folded = _int(path, "engine n_folded", engine["n_folded"], 0, 2**53)
    _int(path, "engine n_pending", engine["n_pending"], 0, pending)
    expected = {"bias.coefficients", "bias.hill_centers", "bias.hill_heights", "bias.hill_times",
                "engine.folded_values", *_MD_ARRAYS}
    if set(arrays) != expected:
        _fail(path, f"arrays are {sorted(arrays)[:10]}, expected {sorted(expected)}")
    folded = arrays["engine.folded_values"]
    if folded.dtype != np.float64 or not np.isfinite(folded).all():
        _fail(path, "engine.folded_values must be finite float64 values")
    blob = arrays["md.checkpoint"]
    if blob.dtype != np.uint8 or blob.ndim != 1:
        _fail(path, "md.checkpoint must be a flat uint8 array")
    for name, shape in (("md.positions", (n_particles, 3)), ("md.velocities", (n_particles, 3)),
                        ("md.box", (3, 3))):
        a = arrays[name]
        if a.dtype != np.float64 or a.shape != shape or not np.isfinite(a).all():
            _fail(path, f"{name} must be finite float64 of shape {shape} (the metadata's {n_particles} "
                        f"particles), got {a.shape} {a.dtype}")
    bias_arrays = {k[len("bias."):]: v for k, v in arrays.items() if k.startswith("bias.")}
    return {"bias_meta": bias_meta, "bias_arrays": bias_arrays, "cvs": cvs, "labels": labels,
            "n_particles": n_particles, "step": step, "time_ps": float(time_ps), "platform": meta["platform"],
            "folded": folded, "n_folded": n_folded}
