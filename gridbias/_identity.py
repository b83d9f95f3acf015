"""Run identity: the random id that ties one run's checkpoints and CV logs together, and the one check that
refuses to combine files of different runs.

A run gets its id when its bias is made (``GridBias.run_id``, 32 hex digits from the operating system's
random source). A bias loaded or restored from a file takes the file's id, walkers sharing a bias share
rank 0's id, and the OpenMM reporter writes it into the CV log's header, so every file of one run, across
restarts and walkers, carries the same id.
"""

from __future__ import annotations

import math
import re
import secrets

__all__ = ["new_run_id", "check_run_id", "check_log_metadata", "describe_mismatch"]

_RUN_ID_RE = re.compile(r"[0-9a-f]{32}")


def new_run_id() -> str:
    """A fresh random run id: 32 lower-case hex digits (128 bits)."""
    return secrets.token_hex(16)


def check_run_id(value, where: str = "run_id") -> str:
    """`value` if it is a run id, else ValueError naming `where`."""
    if not isinstance(value, str) or not _RUN_ID_RE.fullmatch(value):
        raise ValueError(f"{where} must be 32 hex digits, got {str(value)[:80]!r}")
    return value


def _number(value, where, *, low, low_ok=False):
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise ValueError(f"{where} must be a finite number, got {str(value)[:80]!r}")
    if value < low or (value == low and not low_ok):
        raise ValueError(f"{where} must be {'>=' if low_ok else '>'} {low}, got {value!r}")


def check_log_metadata(metadata: dict) -> None:
    """Check the fields gridbias itself writes into a CV log's metadata (others are the user's own).

    ``run_id`` (32 hex digits), ``temperature`` (K, finite, > 0), ``bias_factor`` (None or > 1), ``stride``
    (integer >= 1), ``grid`` (a valid grid) and ``cvs`` (a list of dicts). Raises ValueError.
    """
    from .grid import Grid

    if "run_id" in metadata:
        check_run_id(metadata["run_id"], "metadata run_id")
    if "temperature" in metadata:
        _number(metadata["temperature"], "metadata temperature", low=0)
    if metadata.get("bias_factor") is not None:
        _number(metadata["bias_factor"], "metadata bias_factor", low=1)
    if "stride" in metadata:
        stride = metadata["stride"]
        if isinstance(stride, bool) or not isinstance(stride, int) or stride < 1:
            raise ValueError(f"metadata stride must be an integer >= 1, got {str(stride)[:80]!r}")
    if "grid" in metadata:
        spec = metadata["grid"]
        if not isinstance(spec, dict) or set(spec) != {"lower", "upper", "bins", "periodic"}:
            raise ValueError("metadata grid must be a dict of lower, upper, bins and periodic")
        Grid.from_dict(spec)  # GridError is a ValueError
    if "cvs" in metadata:
        cvs = metadata["cvs"]
        if not isinstance(cvs, list) or not all(isinstance(c, dict) for c in cvs):
            raise ValueError("metadata cvs must be a list of CV descriptions (dicts)")


def describe_mismatch(checkpoint: str, facts: dict, log: str, metadata: dict) -> str:
    """One line saying why the CV log `log` does not belong to the run of `checkpoint` ('' if it may).

    Parameters
    ----------
    checkpoint, log : str
        The two file names, for the message.
    facts : dict
        What the checkpoint says: ``run_id`` (or None for older files), ``cvs`` (list of CV descriptions,
        or None when the file has none), ``grid`` (a Grid), ``temperature`` (K), ``bias_factor``.
    metadata : dict
        The CV log's metadata (a checked one, see `check_log_metadata`).

    Notes
    -----
    Compared when both files record them: the run id, the CVs, the grid, the temperature and the bias
    factor. A log that records other CVs or another temperature is refused even when neither file has a
    run id (files from before run ids existed).
    """
    from .grid import Grid

    differences = []
    theirs = metadata.get("run_id")
    if facts.get("run_id") is not None and theirs is not None and facts["run_id"] != theirs:
        differences.append(f"run id {facts['run_id']} vs {theirs}")
    if facts.get("cvs") is not None and metadata.get("cvs") is not None and facts["cvs"] != metadata["cvs"]:
        n_a, n_b = len(facts["cvs"]), len(metadata["cvs"])
        which = next((i for i in range(min(n_a, n_b)) if facts["cvs"][i] != metadata["cvs"][i]), None)
        differences.append(f"CVs: {n_a} vs {n_b} CVs" if which is None else
                           f"CV {which}: {facts['cvs'][which]} vs {metadata['cvs'][which]}")
    if "grid" in metadata and facts.get("grid") is not None:
        diff = facts["grid"].describe_difference(Grid.from_dict(metadata["grid"]))
        if diff:
            differences.append(f"grid {diff}")
    if "temperature" in metadata and not math.isclose(facts["temperature"], metadata["temperature"],
                                                       rel_tol=1e-12):
        differences.append(f"temperature {facts['temperature']:g} K vs {metadata['temperature']:g} K")
    if "bias_factor" in metadata and facts.get("bias_factor") != metadata["bias_factor"]:
        differences.append(f"bias factor {facts.get('bias_factor')} vs {metadata['bias_factor']}")
    if not differences:
        return ""
    return (f"CV log {log!r} does not belong to the run of checkpoint {checkpoint!r}: "
            f"{'; '.join(differences)} (checkpoint vs log)")
