"""Benchmark of the methods (issue 9, item 3): each shape against its outside reference.

    python tests/perf/methods_bench.py [--only embed100k,embed500k,wide-n,d2000] [--ks 10,100,256]
                                       [--scratch DIR]

Cases (synthetic data written here, float32 like embeddings; spectrum: 20 separated
components over a slowly falling tail, so every k has a gap after it):

* ``embed100k`` 100k x 4096 and ``embed500k`` 500k x 1024, one fixed-size-list column:
  pcapipe ``auto`` (and each method it did not pick, for k = 10) against scikit-learn
  ``PCA(svd_solver="covariance_eigh")`` including its load (its fastest accurate solver;
  ``randomized`` is off by 4-6% at k >= 100, issue 9);
* ``wide-n`` 64 x 6,830 scalar columns (gene-expression-sized): pcapipe ``auto`` against
  ``pyarrow`` read + ``numpy.linalg.svd(full_matrices=False)`` of the centred matrix;
* ``d2000``: the decomposition alone of a 2000 x 2000 covariance with k = 100, LAPACK
  through ``pcapipe.eigen.eigensolve`` against the block Krylov solver on the same matrix
  (in this process; the data pass is the same for both).

Every contender runs in a fresh child process (``measure.run_child``: wall time, peak RSS).
Eigenvalue errors are against ``numpy.linalg.eigvalsh`` of the float64 covariance of the
stored values.  Prints a markdown table.  Not collected by pytest; asserts nothing.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(os.path.dirname(HERE))
sys.path.insert(0, HERE)
sys.path.insert(0, REPO)

import measure  # noqa: E402

SHAPES = {"embed100k": (100_000, 4096), "embed500k": (500_000, 1024), "wide-n": (64, 6830)}


def _spectrum(d: int) -> np.ndarray:
    j = np.arange(d, dtype=float)
    return np.where(j < 20, 40 * 0.85**j, 0.5 * (1 + j / 50) ** -0.5)


def _write(root: str, name: str) -> tuple[list[str], str]:
    n, d = SHAPES[name]
    base = os.path.join(root, name)
    vector = name != "wide-n"
    paths = [os.path.join(base, f"part-{i:02d}.parquet") for i in range(4 if vector else 1)]
    if all(os.path.exists(p) for p in paths):
        return paths, base
    os.makedirs(base, exist_ok=True)
    rng = np.random.default_rng(0)
    q = np.linalg.qr(rng.standard_normal((d, min(d, 64))))[0]
    lam = _spectrum(d)
    rows = n // len(paths)
    for i, path in enumerate(paths):
        z = rng.standard_normal((rows, d), dtype=np.float32) * np.sqrt(lam[-1]).astype(np.float32)
        # the leading 64 directions carry the designed spectrum above the tail
        z += (rng.standard_normal((rows, q.shape[1])) * np.sqrt(np.maximum(lam[:64] - lam[-1], 0))) @ q.T
        x = (z + 3.0).astype(np.float32)
        if vector:
            table = pa.table({"emb": pa.FixedSizeListArray.from_arrays(pa.array(x.ravel()), d)})
        else:
            table = pa.table({f"g{j:04d}": x[:, j] for j in range(d)})
        pq.write_table(table, path, row_group_size=25_000)
    return paths, base


def _reference(paths, name: str, base: str) -> np.ndarray:
    cache = os.path.join(base, "reference.npy")
    if os.path.exists(cache):
        return np.load(cache)
    n, d = SHAPES[name]
    x = _load(paths, name != "wide-n").astype(np.float64)
    x -= x.mean(axis=0)
    w = np.linalg.eigvalsh(x.T @ x / (n - 1) if n >= d else x @ x.T / (n - 1))[::-1]
    np.save(cache, w)
    return w


def _load(paths, vector: bool) -> np.ndarray:
    parts = []
    for p in paths:
        t = pq.read_table(p)
        if vector:
            col = t.column(0).combine_chunks()
            parts.append(col.flatten().to_numpy().reshape(len(col), -1))
        else:
            parts.append(np.column_stack([c.to_numpy() for c in t.columns]))
    return np.concatenate(parts)


def _child_sklearn(spec) -> dict:
    from sklearn.decomposition import PCA

    t = time.perf_counter()
    x = _load(spec["paths"], spec["vector"])
    t_load = time.perf_counter() - t
    pca = PCA(n_components=spec["k"], svd_solver="covariance_eigh").fit(x)
    return {"values": pca.explained_variance_.tolist(), "load_seconds": t_load,
            "fit_seconds": time.perf_counter() - t - t_load}


def _child_numpy_svd(spec) -> dict:
    x = _load(spec["paths"], spec["vector"]).astype(np.float64)
    s = np.linalg.svd(x - x.mean(axis=0), full_matrices=False, compute_uv=True)[1]
    return {"values": (s[: spec["k"]] ** 2 / (x.shape[0] - 1)).tolist()}


def _child_d2000(spec) -> dict:
    from pcapipe.eigen import eigensolve
    from pcapipe.operators import DenseOperator

    rng = np.random.default_rng(0)
    d = 2000
    q = np.linalg.qr(rng.standard_normal((d, d)))[0]
    c = (q * _spectrum(d)) @ q.T
    op = DenseOperator(c)
    if spec["how"] == "iterative":
        op = type("Plain", (), {"matmat": op.matmat, "n_features": d, "trace": op.trace})()
    t = time.perf_counter()
    res = eigensolve(op, 100, tolerance=1e-9, max_iterations=300, oversample=8, rng=rng)
    return {"values": res.values.tolist(), "solve_seconds": time.perf_counter() - t,
            "reference": np.sort(_spectrum(d))[::-1][:100].tolist()}


def _child(argv) -> int:
    with open(argv[0]) as f:
        spec = json.load(f)
    out = {"sklearn": _child_sklearn, "numpy-svd": _child_numpy_svd, "d2000": _child_d2000}[spec["what"]](spec)
    with open(spec["out"], "w") as f:
        json.dump(out, f)
    return 0


class Runner:
    def __init__(self, scratch: str):
        self.scratch = scratch
        self.env = measure.child_env(REPO)
        self.rows = []

    def _run(self, label, argv, spec=None):
        out = os.path.join(self.scratch, f"{label}.json")
        if spec is not None:
            spec = {**spec, "out": out}
            spec_path = os.path.join(self.scratch, f"{label}.spec.json")
            with open(spec_path, "w") as f:
                json.dump(spec, f)
            argv = argv + [spec_path]
        res = measure.run_child(argv, self.env, os.path.join(self.scratch, f"{label}.log"), 1800.0,
                                cwd=self.scratch)
        info = {}
        if spec is not None and os.path.exists(out):
            with open(out) as f:
                info = json.load(f)
        print(f"  {label}: {res.wall_seconds:.1f} s, {res.peak_rss_mb:.0f} MB, others {res.others_cores:.2f} "
              f"cores, exit {res.returncode}", file=sys.stderr)
        return res, info

    def pcapipe(self, label, paths, vector, k, method):
        cfg = os.path.join(self.scratch, f"{label}.toml")
        inp = {"paths": paths, **({"vector_column": "emb"} if vector else {})}
        from conftest import write_toml

        out_dir = os.path.join(self.scratch, "runs", label)
        write_toml(cfg, {"input": inp, "model": {"components": k, "method": method},
                         "compute": {"scheduler": "threads", "progress": False},
                         "output": {"directory": out_dir, "scores": False, "overwrite": True,
                                    "report": False}})
        res, _ = self._run(label, [sys.executable, "-m", "pcapipe", "run", cfg])
        man = json.load(open(os.path.join(out_dir, "manifest.json"))) if res.returncode == 0 else {}
        spec = pq.read_table(os.path.join(out_dir, "spectrum.parquet")).to_pydict() if man else {}
        values = [v for v, r in zip(spec.get("eigenvalue", []), spec.get("retained", [])) if r]
        return res, man, values

    def add(self, case, label, res, values, ref, note=""):
        err = (float(np.max(np.abs(np.asarray(values) / ref[: len(values)] - 1))) if values else float("nan"))
        self.rows.append((case, label, res.wall_seconds, res.peak_rss_mb, err, res.others_cores, note))


def _table(rows) -> str:
    lines = ["| case | contender | wall s | peak RSS MB | max eigenvalue rel. err | others (cores) | note |",
             "|---|---|---|---|---|---|---|"]
    for case, label, wall, rss, err, others, note in rows:
        lines.append(f"| {case} | {label} | {wall:.1f} | {rss:.0f} | {err:.1e} | {others:.2f} | {note} |")
    return "\n".join(lines)


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if argv and argv[0] == "--child":
        return _child(argv[1:])
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", default="d2000,wide-n,embed100k,embed500k")
    ap.add_argument("--ks", default="10,100,256")
    ap.add_argument("--scratch", default=os.path.join(tempfile.gettempdir(), "pcapipe-methods-bench"))
    args = ap.parse_args(argv)
    os.makedirs(os.path.join(args.scratch, "runs"), exist_ok=True)
    sys.path.insert(0, os.path.join(REPO, "tests"))
    run = Runner(args.scratch)
    me = [sys.executable, os.path.abspath(__file__), "--child"]
    ks = [int(k) for k in args.ks.split(",")]
    for case in args.only.split(","):
        print(case, file=sys.stderr)
        if case == "d2000":
            for how in ("lapack", "iterative"):
                res, info = run._run(f"d2000-{how}", me, {"what": "d2000", "how": how})
                run.add("d=2000, k=100 (decomposition only)", f"{how}: {info.get('solve_seconds', 0):.2f} s solve",
                        res, info.get("values", []), np.asarray(info.get("reference", [1.0])))
            continue
        paths, base = _write(args.scratch, case)
        vector = case != "wide-n"
        ref = _reference(paths, case, base)
        n, d = SHAPES[case]
        title = f"{case} {n} x {d} f32"
        if case == "wide-n":
            res, info = run._run("wide-n-numpy", me, {"what": "numpy-svd", "paths": paths, "vector": False, "k": 5})
            run.add(title, "pyarrow read + numpy thin SVD", res, info.get("values", []), ref)
            res, man, values = run.pcapipe("wide-n-auto", paths, False, 5, "auto")
            run.add(title, f"pcapipe auto ({man.get('method')})", res, values, ref)
            continue
        for k in ks:
            res, info = run._run(f"{case}-sk-{k}", me, {"what": "sklearn", "paths": paths, "vector": True, "k": k})
            run.add(title, f"scikit-learn covariance_eigh k={k}", res, info.get("values", []), ref,
                    f"load {info.get('load_seconds', 0):.1f} s, fit {info.get('fit_seconds', 0):.1f} s")
            res, man, values = run.pcapipe(f"{case}-auto-{k}", paths, True, k, "auto")
            picked = man.get("method")
            run.add(title, f"pcapipe auto k={k} ({picked})", res, values, ref,
                    f"{man.get('passes_over_data')} passes, {man.get('solver', {}).get('operator_applications')} C·V")
    print(_table(run.rows))
    return 0


if __name__ == "__main__":
    sys.exit(main())
