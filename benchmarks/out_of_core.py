"""Peak memory of a run whose training data are read in chunks ([data].chunk_rows).

Writes a synthetic training run of N rows (3 states + 1 input, as Parquet row groups)
and a short held-out run to a temporary folder, then runs `discover run` on it in a
child process with a degree-3 library (35 terms) and prints the child's peak resident
memory and wall time, next to the size the library matrix would have in memory.

Run: python benchmarks/out_of_core.py [--rows 10000000] [--chunk-rows 250000]
"""

from __future__ import annotations

import argparse
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def write_run(path, n_rows, seed, chunk=1_000_000):
    """Smooth random trajectories (low-pass filtered noise), written group by group."""
    import pyarrow as pa
    import pyarrow.parquet as pq
    from scipy.signal import lfilter

    rng = np.random.default_rng(seed)
    state = np.zeros((2, 4))
    writer = None
    for start in range(0, n_rows, chunk):
        n = min(chunk, n_rows - start)
        noise = rng.standard_normal((n, 4))
        filtered = np.empty_like(noise)
        for j in range(4):
            # Second-order low-pass, its state carried across chunks.
            b, a = [1e-4], [1.0, -1.98, 0.9801]
            filtered[:, j], state_j = lfilter(b, a, noise[:, j], zi=state[:, j] if start else np.zeros(2))
            state[:, j] = state_j
        table = pa.table({"t": (start + np.arange(n)) * 1e-3, "x1": filtered[:, 0], "x2": filtered[:, 1],
                          "x3": filtered[:, 2], "u": filtered[:, 3]})
        writer = writer or pq.ParquetWriter(path, table.schema)
        writer.write_table(table)
    writer.close()


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=float, default=1e7)
    parser.add_argument("--chunk-rows", type=int, default=250_000)
    args = parser.parse_args()
    n_rows = int(args.rows)
    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        start = time.perf_counter()
        write_run(folder / "long.parquet", n_rows, seed=1)
        write_run(folder / "heldout.parquet", 20_000, seed=2)
        print(f"wrote {n_rows:.0e} training rows in {time.perf_counter() - start:.1f} s")
        (folder / "config.toml").write_text(f"""
seed = 0
[data]
files = ["*.parquet"]
states = ["x1", "x2", "x3"]
inputs = ["u"]
held_out = ["heldout"]
chunk_rows = {args.chunk_rows}
[derivatives]
method = "savitzky_golay"
window = 11
[terms]
degree = 3
[bootstrap]
members = 20
bands = false
[ranking]
sr3 = false
[output]
figures = false
report = false
""")
        start = time.perf_counter()
        proc = subprocess.run([sys.executable, "-m", "discover", "run", str(folder / "config.toml"),
                               "--out", str(folder / "out")], capture_output=True, text=True)
        wall = time.perf_counter() - start
        peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 2**20  # KiB -> GiB on Linux
        if proc.returncode:
            print(proc.stderr)
            raise SystemExit(proc.returncode)
        print(f"discover run: {wall:.1f} s, peak resident memory {peak:.2f} GiB "
              f"(the 35-term library matrix alone would be {n_rows * 38 * 8 / 2**30:.1f} GiB)")


if __name__ == "__main__":
    main()
