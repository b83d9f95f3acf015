"""Files with a valid checksum that say impossible things never load, and cost no more memory than they hold.

The forger (tests/core/forge.py) writes checkpoints and CV logs byte by byte from the documented formats.
Every case must end in CheckpointError / CVLogError, never another exception, never a silent load.
"""

import json
import math
import tracemalloc
import zipfile

import numpy as np
import pytest
from forge import checkpoint_bytes, forge_checkpoint, forge_cvlog, npy_bytes, zip_bytes
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import gridbias as gb
from gridbias import runs
from gridbias.cvlog import read_cvlog

SETTINGS = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


def valid_state(seed=0, hills=12):
    grid = gb.Grid([-1.0, 0.0], [1.0, 2.0], [24, 20], [False, True])
    bias = gb.GridBias(grid, sigma=[0.25, 0.3], height=1.0, temperature=300.0, bias_factor=8.0,
                       walls=[gb.Wall(0, 0.8, 100.0, "above")])
    rng = np.random.default_rng(seed)
    for i, c in enumerate(rng.uniform([-0.9, 0.0], [0.9, 2.0], size=(hills, 2))):
        bias.deposit(c, time=0.5 * i)
    return bias.to_state()


def load(tmp_path, data: bytes):
    path = tmp_path / "forged.gbz"
    path.write_bytes(data)
    return gb.GridBias.load(path)


# JSON values of every type, some absurd: what a forger may put in any metadata field.
JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers(-10**30, 10**30) | st.sampled_from([2**63, -1, 0, 2**53 + 1])
    | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=8),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=5), inner, max_size=4),
    max_leaves=12)
FIELDS = ["version", "grid", "sigma", "height", "temperature", "bias_factor", "cutoff", "walls", "n_hills",
          "n_outside", "run_id", "grid.lower", "grid.upper", "grid.bins", "grid.periodic", "walls.0", "kind"]


@SETTINGS
@given(field=st.sampled_from(FIELDS), value=JSON_VALUES, seed=st.integers(0, 3))
def test_any_metadata_field_forged_is_refused_or_harmless(tmp_path, field, value, seed):
    meta, arrays = valid_state(seed)
    target, key = meta, field
    if "." in field:
        outer, key = field.split(".")
        target = meta[outer]
        key = int(key) if isinstance(target, list) else key
    target[key] = value
    try:
        bias = load(tmp_path, forge_checkpoint("gridbias.bias", meta, arrays))
    except gb.CheckpointError:
        return
    # Loaded: the forged value was another valid setting (a height, a temperature, no walls, 300 for 300.0...)
    # and the file still says one consistent thing: sound parameters, a table that is the replay of its hills.
    assert np.isfinite(bias.values).all() and bias.n_outside >= 0
    np.testing.assert_allclose(bias.values, bias.rebuilt().values, rtol=0, atol=1e-9)
    gb.GridBias.from_state(*bias.to_state())


ARRAY_EDITS = {
    "table value": lambda a, i, x: a["coefficients"].reshape(-1).__setitem__(i % a["coefficients"].size, x),
    "hill height": lambda a, i, x: a["hill_heights"].__setitem__(i % a["hill_heights"].size, x),
    "hill centre": lambda a, i, x: a["hill_centers"].reshape(-1).__setitem__(i % a["hill_centers"].size, x),
}


@SETTINGS
@given(edit=st.sampled_from(sorted(ARRAY_EDITS)), index=st.integers(0, 10**6),
       value=st.floats(allow_nan=True, allow_infinity=True) | st.sampled_from([np.nan, np.inf, -1.0, 1e300]),
       seed=st.integers(0, 3))
def test_contents_that_contradict_the_hills_are_refused(tmp_path, edit, index, value, seed):
    """The table must be the replay of its own hills (to rounding), heights finite >= 0, centres inside."""
    meta, arrays = valid_state(seed)
    before = {k: v.copy() for k, v in arrays.items()}
    ARRAY_EDITS[edit](arrays, index, value)
    changed = not all(np.array_equal(before[k], arrays[k], equal_nan=True) for k in arrays)
    try:
        bias = load(tmp_path, forge_checkpoint("gridbias.bias", meta, arrays))
    except gb.CheckpointError:
        return
    # A load is allowed only when the edit changed (almost) nothing: the replay check passed to rounding.
    replayed = bias.rebuilt()
    np.testing.assert_allclose(bias.values, replayed.values, rtol=0, atol=1e-9)
    assert not changed or abs(value) < 1e-6 or edit != "table value"


@pytest.mark.parametrize("name, change, match", [
    ("float32 table", lambda m, a: a.update(coefficients=a["coefficients"].astype(np.float32)), "float64"),
    ("table of another grid", lambda m, a: a.update(coefficients=np.zeros((4, 10, 10, 1))), r"need \(4, 25"),
    ("one hill fewer", lambda m, a: a.update(hill_heights=a["hill_heights"][:-1]), "n_hills=12"),
    ("hill count says more", lambda m, a: m.update(n_hills=13), "n_hills=13"),
    ("negative outside count", lambda m, a: m.update(n_outside=-1), "n_outside = -1 is out of range"),
    ("count as float", lambda m, a: m.update(n_hills=12.0), "n_hills must be an integer"),
    ("bins as text", lambda m, a: m["grid"].update(bins=["24", "20"]), "grid bins must be a list of int"),
    ("grid beyond the memory budget", lambda m, a: m["grid"].update(bins=[10**6, 10**6]), "memory budget"),
    ("span that overflows", lambda m, a: m["grid"].update(lower=[-1e308, 0.0], upper=[1e308, 2.0]), "overflows"),
    ("extra array", lambda m, a: a.update(extra=np.zeros(3)), "arrays are"),
    ("unknown field", lambda m, a: m.update(surprise=1), "unknown fields"),
    ("walker count as text", lambda m, a: m.update(walkers={"count": "2", "exchanges": 0}), "count must be an integer"),
    ("negative exchanges", lambda m, a: m.update(walkers={"count": 2, "exchanges": -3}), "exchanges = -3 is out"),
    ("infinite time", lambda m, a: a["hill_times"].__setitem__(0, np.inf), "finite or NaN"),
    ("centre outside the grid", lambda m, a: a["hill_centers"].__setitem__((0, 0), 5.0), "inside the grid"),
    ("periodic centre far out", lambda m, a: a["hill_centers"].__setitem__((1, 1), 2.4e56), "periods of the grid"),
    ("zero height table", lambda m, a: a["coefficients"].__setitem__(Ellipsis, 0.0), "replay of its 12 hills"),
])
def test_examples_of_impossible_states(tmp_path, name, change, match):
    meta, arrays = valid_state()
    change(meta, arrays)
    with pytest.raises(gb.CheckpointError, match=match):
        load(tmp_path, forge_checkpoint("gridbias.bias", meta, arrays))


@pytest.mark.parametrize("raw, match", [
    (b'{"a": 1e400}', "does not fit a float"),
    (b'{"a": NaN}', "NaN is not allowed"),
    (b'{"a": -Infinity}', "Infinity is not allowed"),
    (b"[" * 100_000 + b"]" * 100_000, "nested deeper"),
    (b'{"a": ' + b"9" * 5000 + b"}", "ValueError"),
])
def test_json_a_writer_never_produces_is_refused(tmp_path, raw, match):
    _, arrays = valid_state()
    with pytest.raises(gb.CheckpointError, match=match):
        load(tmp_path, forge_checkpoint("gridbias.bias", raw, arrays))


def test_a_small_file_declaring_huge_arrays_allocates_nothing_big(tmp_path):
    """A 33 KB file whose .npy headers declare a 16 GB array: refused before allocating (memory bounded)."""
    meta, arrays = valid_state()
    lying = npy_bytes(shape=(2**31,), dtype="<f8", data=b"\0" * 32_000)
    data = forge_checkpoint("gridbias.bias", meta, {**arrays, "coefficients": lying})
    assert len(data) < 40_000
    tracemalloc.start()
    try:
        with pytest.raises(gb.CheckpointError, match=r"shape \(2147483648,\) of float64 needs 17179869184 bytes"):
            load(tmp_path, data)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 5 * 2**20, peak


def test_compressed_members_are_refused_before_decompressing(tmp_path):
    """A deflated member (a zip bomb: 100 MB of zeros in about 100 KB) is never inflated."""
    meta, arrays = valid_state()
    bomb = npy_bytes(shape=(12_500_000,), dtype="<f8", data=b"\0" * 100_000_000)
    members = {"__meta__.npy": npy_bytes(np.frombuffer(json.dumps(meta).encode(), np.uint8)), "bomb.npy": bomb}
    data = checkpoint_bytes("gridbias.bias", zip_bytes(members, compression=zipfile.ZIP_DEFLATED))
    assert len(data) < 200_000
    tracemalloc.start()
    try:
        with pytest.raises(gb.CheckpointError, match="compression method 8; gridbias writes members uncompressed"):
            load(tmp_path, data)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 5 * 2**20, peak


@pytest.mark.parametrize("members, match", [
    ({"a.npy": b"x"}, "reading magic string"),
    ({"__meta__.npy": npy_bytes(np.zeros(3, np.uint8)), "../evil.npy": npy_bytes(np.zeros(1))},
     "not one gridbias writes"),
    ({"__meta__.npy": npy_bytes(np.frombuffer(b"{}", np.uint8)), "o.npy": npy_bytes(shape=(1,), dtype="O")},
     "dtype object"),
])
def test_archive_members_the_writer_never_makes_are_refused(tmp_path, members, match):
    with pytest.raises(gb.CheckpointError, match=match):
        load(tmp_path, checkpoint_bytes("gridbias.bias", zip_bytes(members)))


# ---------------------------------------------------------------------------------------------- CV logs
def log_text(metadata, columns=("step", "time", "cv0", "cv1", "bias")):
    return json.dumps({"columns": list(columns), "units": ["1"] * len(columns), "metadata": metadata}).encode()


@pytest.mark.parametrize("metadata, match", [
    ({"run_id": "not hex"}, "run_id must be 32 hex digits"),
    ({"temperature": -3}, "temperature must be > 0"),
    ({"temperature": "300"}, "temperature must be a finite number"),
    ({"bias_factor": 0.5}, "bias_factor must be > 1"),
    ({"stride": 0}, "stride must be an integer >= 1"),
    ({"grid": {"lower": [0], "upper": [1], "bins": [10**7, 10**7, 10**7], "periodic": [False]}}, "bins"),
    ({"cvs": "phi"}, "cvs must be a list"),
])
def test_log_metadata_gridbias_wrote_is_checked_before_use(tmp_path, metadata, match):
    path = tmp_path / "forged.gbl"
    path.write_bytes(forge_cvlog(log_text(metadata), 5, np.zeros((6, 5)).tobytes()))
    with pytest.raises(gb.CVLogError, match=f"impossible metadata: .*{match}"):
        runs.read_log(path)


@pytest.mark.parametrize("text, match", [
    (b'{"columns": ["a"], "units": ["1"], "metadata": {"x": 1e400}}', "does not fit a float"),
    (b'{"columns": ["a"], "units": ["1"], "metadata": ' + b"[" * 50_000 + b"]" * 50_000 + b"}", "nested deeper"),
    (b'{"columns": ["a"], "units": ["1"], "metadata": {}, "more": 1}', "not {columns, units, metadata}"),
])
def test_log_headers_a_writer_never_produces_are_refused(tmp_path, text, match):
    path = tmp_path / "forged.gbl"
    path.write_bytes(forge_cvlog(text, 1))
    with pytest.raises(gb.CVLogError, match=match):
        read_cvlog(path)


def test_a_wide_header_reads(tmp_path):
    """100,000 columns (the most allowed): the header check is linear (bench/README.md, Faults, times it)."""
    columns = [f"c{i}" for i in range(100_000)]
    path = tmp_path / "wide.gbl"
    path.write_bytes(forge_cvlog(log_text({}, columns), len(columns)))
    assert read_cvlog(path).columns[-1] == "c99999"


@SETTINGS
@given(metadata=st.dictionaries(st.sampled_from(["run_id", "temperature", "bias_factor", "stride", "grid", "cvs"]),
                                JSON_VALUES, max_size=3))
def test_any_forged_log_metadata_ends_in_cvlogerror_or_loads(tmp_path, metadata):
    path = tmp_path / "forged.gbl"
    path.write_bytes(forge_cvlog(log_text(metadata), 5, np.zeros((6, 5)).tobytes()))
    try:
        log = runs.read_log(path)
    except gb.CVLogError:
        return
    t = log.metadata.get("temperature", 1.0)
    assert isinstance(t, (int, float)) and math.isfinite(t) and t > 0
