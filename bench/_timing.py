"""Small timing helpers shared by the benchmark scripts (medians of repeated batches)."""

import time

import numpy as np


def per_call_seconds(func, *, calls=200, repeats=7, warmup=3):
    """Median over ``repeats`` batches of the mean seconds per call of ``func()``."""
    for _ in range(warmup):
        func()
    batches = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        for _ in range(calls):
            func()
        batches.append((time.perf_counter() - t0) / calls)
    return float(np.median(batches))


def markdown_table(header, rows):
    """Render rows (lists of cells) as a GitHub markdown table."""
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    lines += ["| " + " | ".join(str(c) for c in row) + " |" for row in rows]
    return "\n".join(lines)
