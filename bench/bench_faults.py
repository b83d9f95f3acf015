"""Faults: how many damaged, forged or impossible files the readers refuse, and what the replay check costs.

    python bench/bench_faults.py            # about two minutes on 2 cores
    python bench/bench_faults.py --quick    # a tenth of the files

Prints markdown tables for bench/README.md ("Faults"). Every file tried must be refused with the reader's
own error (CheckpointError / CVLogError); any other exception or a silent load is counted and printed.
"""

import argparse
import json
import os
import sys
import tempfile
import time
import warnings
import zipfile

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "tests", "core"))
from forge import checkpoint_bytes, forge_checkpoint, forge_cvlog, npy_bytes, zip_bytes  # noqa: E402

import gridbias as gb  # noqa: E402
from gridbias import _consistency, runs  # noqa: E402
from gridbias.cvlog import CVLogWriter, read_cvlog  # noqa: E402

warnings.simplefilter("ignore")


def sample_bias(seed=0, hills=40):
    grid = gb.Grid([-1.0, 0.0], [1.0, 2.0], [40, 36], [False, True])
    bias = gb.GridBias(grid, sigma=[0.2, 0.25], height=1.0, temperature=300.0, bias_factor=8.0)
    rng = np.random.default_rng(seed)
    for i, c in enumerate(rng.uniform([-0.9, 0.0], [0.9, 2.0], size=(hills, 2))):
        bias.deposit(c, time=0.5 * i)
    return bias


class Tally:
    def __init__(self):
        self.rows = []

    def run(self, name, files, read, error):
        tried = refused = 0
        other = []
        with tempfile.TemporaryDirectory() as folder:
            path = os.path.join(folder, "f")
            for data in files:
                with open(path, "wb") as f:
                    f.write(data)
                tried += 1
                try:
                    read(path)
                except error:
                    refused += 1
                except Exception as exc:  # noqa: BLE001 - what the benchmark counts
                    other.append(f"{type(exc).__name__}: {exc}"[:120])
        self.rows.append((name, tried, refused, len(other)))
        for line in other[:5]:
            print("   NOT REFUSED CLEANLY:", line)


def damaged_checkpoints(raw, rng, n):
    """Bit flips, truncations and appended bytes of a real file (the checksum catches them)."""
    for _ in range(n):
        data = bytearray(raw)
        kind = rng.integers(3)
        if kind == 0:
            for _ in range(int(rng.integers(1, 5))):
                i = int(rng.integers(len(data)))
                data[i] ^= 1 << int(rng.integers(8))
        elif kind == 1:
            data = data[: int(rng.integers(len(data)))]
        else:
            data += bytes(rng.integers(0, 256, int(rng.integers(1, 64)), dtype=np.uint8))
        yield bytes(data)


def impossible_states(bias, rng, n):
    """Checksum-valid bias checkpoints whose content is impossible, one class per draw."""
    meta0, arrays0 = bias.to_state()
    absurd = [None, "x", -1, 1e300, 2**64, [], {}, True, [1e308, -1e308], 0.0]
    for k in range(n):
        meta = json.loads(json.dumps(meta0))
        arrays = {name: a.copy() for name, a in arrays0.items()}
        case = k % 8
        if case == 0:  # a table that is not the replay of its hills
            flat = arrays["coefficients"].reshape(-1)
            flat[int(rng.integers(flat.size))] += float(rng.choice([1e-6, 1e-3, 1.0, -5.0]))
        elif case == 1:  # non-finite or negative numbers in arrays
            name = str(rng.choice(["coefficients", "hill_heights", "hill_centers"]))
            value = float(rng.choice([np.nan, np.inf, -1.0]))
            arrays[name].reshape(-1)[int(rng.integers(arrays[name].size))] = value
        elif case == 2:  # metadata of the wrong type or range
            field = str(rng.choice(["n_hills", "n_outside", "sigma", "cutoff", "grid", "walls", "version"]))
            meta[field] = absurd[int(rng.integers(len(absurd)))]
            if meta[field] == meta0[field]:
                meta[field] = "x"
        elif case == 3:  # arrays that do not fit the metadata
            name = str(rng.choice(sorted(arrays)))
            arrays[name] = arrays[name].astype(str(rng.choice(["float32", "int64", "complex128"])))
        elif case == 4:  # a hill count, grid or width that disagrees with the arrays
            field = str(rng.choice(["n_hills", "grid.bins", "sigma", "cutoff"]))
            if field == "grid.bins":
                meta["grid"]["bins"] = [b + 1 for b in meta["grid"]["bins"]]
            elif field == "n_hills":
                meta["n_hills"] += int(rng.integers(1, 5))
            else:
                meta[field] = [s * 1.01 for s in meta[field]] if field == "sigma" else meta[field] * 1.01
        elif case == 5:  # a .npy header that claims a huge array in a small file
            yield forge_checkpoint("gridbias.bias", meta, {**arrays, "coefficients": npy_bytes(
                shape=(int(rng.integers(2**30, 2**40)),), dtype="<f8", data=b"\0" * 30_000)})
            continue
        elif case == 6:  # a compressed (zip bomb) member
            members = {"__meta__.npy": npy_bytes(np.frombuffer(json.dumps(meta).encode(), np.uint8)),
                       "coefficients.npy": npy_bytes(shape=(2_000_000,), dtype="<f8", data=b"\0" * 16_000_000)}
            yield checkpoint_bytes("gridbias.bias", zip_bytes(members, compression=zipfile.ZIP_DEFLATED))
            continue
        else:  # JSON the writer never produces
            raw = rng.choice([b'{"a": 1e400}', b'{"a": NaN}', b"[" * 20_000 + b"]" * 20_000])
            yield forge_checkpoint("gridbias.bias", bytes(raw), arrays)
            continue
        yield forge_checkpoint("gridbias.bias", meta, arrays)


def damaged_logs(raw, data_offset, rng, n):
    """Bit flips and truncations inside a real CV log's header (its checksum catches them)."""
    for _ in range(n):
        data = bytearray(raw)
        if rng.integers(2):
            i = int(rng.integers(data_offset))
            data[i] ^= 1 << int(rng.integers(8))
        else:
            data = data[: int(rng.integers(data_offset))]
        yield bytes(data)


def impossible_logs(rng, n):
    """Checksum-valid CV logs whose header gridbias never writes, or whose run metadata is impossible."""
    bad = [{"run_id": "zz"}, {"temperature": -1}, {"temperature": "hot"}, {"bias_factor": 0.2},
           {"stride": 0}, {"cvs": "phi"}, {"grid": {"lower": [0], "upper": [0], "bins": [5], "periodic": [False]}}]
    for k in range(n):
        case = k % 3
        if case == 0:
            meta = bad[int(rng.integers(len(bad)))]
            text = json.dumps({"columns": ["step", "time", "cv0"], "units": ["1", "ps", "rad"], "metadata": meta})
        elif case == 1:
            text = '{"columns": ["a"], "units": ["1"], "metadata": {"x": 1e999}}'
        else:
            text = '{"columns": ["a", "a"], "units": ["1", "1"], "metadata": {}}'
        yield forge_cvlog(text.encode(), 3 if case == 0 else (1 if case == 1 else 2), np.zeros(24).tobytes())


class _BadInput(Exception):
    pass


def _cli_inspect(path):
    """`gridbias inspect path`: raise _BadInput for exit 2 with one line, anything else for other outcomes."""
    import contextlib
    import io

    from gridbias.cli import main

    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        code = main(["inspect", path])
    text = err.getvalue()
    if code == 2 and text.count("\n") == 1 and "unexpected" not in text:
        raise _BadInput(text)
    raise RuntimeError(f"exit {code}: {text}")


def fuzz(n):
    tally = Tally()
    rng = np.random.default_rng(2024)
    bias = sample_bias()
    with tempfile.TemporaryDirectory() as folder:
        bias.save(os.path.join(folder, "b.gbz"))
        raw = open(os.path.join(folder, "b.gbz"), "rb").read()
        log_path = os.path.join(folder, "r.gbl")
        with CVLogWriter(log_path, ["step", "time", "cv0"], ["1", "ps", "rad"], {"temperature": 300.0}) as w:
            w.write(np.zeros((10, 3)))
        log_raw = open(log_path, "rb").read()
        log_offset = 64 + -(-int.from_bytes(log_raw[24:32], "little") // 8) * 8
    tally.run("bias checkpoints: bit flips, truncations, appended bytes", damaged_checkpoints(raw, rng, n),
              gb.GridBias.load, gb.CheckpointError)
    tally.run("bias checkpoints: checksum-valid, impossible content (forged)", impossible_states(bias, rng, n),
              gb.GridBias.load, gb.CheckpointError)
    tally.run("CV logs: damaged headers", damaged_logs(log_raw, log_offset, rng, n),
              lambda p: read_cvlog(p), gb.CVLogError)
    tally.run("CV logs: checksum-valid, impossible headers or run metadata (forged)", impossible_logs(rng, n),
              lambda p: runs.read_log(p, min_records=1), gb.CVLogError)
    tally.run("the same forged checkpoints given to `gridbias inspect` (exit 2, one line)",
              impossible_states(bias, np.random.default_rng(99), n), _cli_inspect, _BadInput)
    print("| files | tried | refused with the reader's error | anything else |")
    print("|---|---:|---:|---:|")
    for name, tried, refused, other in tally.rows:
        print(f"| {name} | {tried:,} | {refused:,} | {other} |")
    return tally


def replay_costs(quick):
    print("\n| grid | hills | check used | load with checks (s) | full replay (s, measured or extrapolated) |")
    print("|---|---:|---|---:|---:|")
    rng = np.random.default_rng(7)
    cases = [((100, 100), 10_000), ((100, 100), 100_000), ((48, 48, 48), 1_000), ((48, 48, 48), 10_000)]
    if quick:
        cases = [(b, n // 10) for b, n in cases]
    for bins, n in cases:
        d = len(bins)
        grid = gb.Grid([0.0] * d, [1.0] * d, list(bins), [True] * d)
        bias = gb.GridBias(grid, sigma=3.0 / np.array(bins), height=1.0, temperature=300.0, bias_factor=10.0)
        bias.add_hills(rng.random((n, d)), np.full(n, 0.3), np.arange(n, dtype=float))
        meta, arrays = bias.to_state()
        start = time.perf_counter()
        gb.GridBias.from_state(meta, arrays)
        t_load = time.perf_counter() - start
        full = _consistency.replay_cost(bias) <= _consistency.FULL_REPLAY_BUDGET
        sample = n if full else max(50, min(n, 500))
        start = time.perf_counter()
        bias.rebuilt(sample)
        t_replay = (time.perf_counter() - start) * n / sample
        used = "full replay" if full else f"subset: {_consistency.SUBSET_NODES} nodes and their grid lines"
        note = "" if sample == n else f" (from {sample} hills)"
        print(f"| {'x'.join(map(str, bins))} | {n:,} | {used} | {t_load:.2f} | {t_replay:.1f}{note} |")


def wide_header():
    columns = [f"c{i}" for i in range(100_000)]
    with tempfile.TemporaryDirectory() as folder:
        path = os.path.join(folder, "w.gbl")
        text = json.dumps({"columns": columns, "units": ["1"] * len(columns), "metadata": {}}).encode()
        with open(path, "wb") as f:
            f.write(forge_cvlog(text, len(columns)))
        start = time.perf_counter()
        read_cvlog(path)
        print(f"\nreading a 100,000-column CV-log header: {time.perf_counter() - start:.2f} s")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    args = parser.parse_args()
    n = 100 if args.quick else 1000
    tally = fuzz(n)
    replay_costs(args.quick)
    wide_header()
    bad = sum(other + (tried - refused - other) for _, tried, refused, other in tally.rows)
    sys.exit(1 if bad else 0)


if __name__ == "__main__":
    main()
