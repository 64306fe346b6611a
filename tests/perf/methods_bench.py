"""Benchmark of the methods (issue 9, item 3): each shape against its outside reference.

    python tests/perf/methods_bench.py [--only embed100k,embed500k,wide-n,d2000,wide-d] [--ks 10,100,256]
                                       [--scratch DIR]

Cases (synthetic data written here, float32 like embeddings; spectrum: 20 separated
components over a slowly falling tail, so every k has a gap after it):

* ``embed100k`` 100k x 4096 and ``embed500k`` 500k x 1024, one fixed-size-list column:
  pcapipe ``auto`` (and each method it did not pick, for k = 10) against scikit-learn
  ``PCA(svd_solver="covariance_eigh")`` including its load (its fastest accurate solver;
  ``randomized`` is off by 4-6% at k >= 100, issue 9);
* ``wide-n`` 64 x 6,830 scalar columns (gene-expression-sized): pcapipe ``auto`` against
  ``pyarrow`` read + ``numpy.linalg.svd(full_matrices=False)`` of the centred matrix;
* ``wide-d`` 50k x 10,000 float32 scalar columns, written as users do (5 files of 10k
  rows, ``pyarrow.parquet.write_table`` defaults: one row group per file, snappy,
  dictionary pages), k = 10: the covariance floor (``pyarrow`` read + decode to one
  float64 matrix + one BLAS ``dsyrk`` Gram on all cores) against pcapipe ``auto`` and each
  method forced, at ``memory_limit = "auto"``, and ``auto`` and ``covariance`` at
  ``"2GiB"`` x 2 workers (peak RSS against workers x memory_limit + layout.FIXED_OVERHEAD);
  eigenvalues against ARPACK (``scipy.sparse.linalg.eigsh``) on the floor's Gram;
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

SHAPES = {"embed100k": (100_000, 4096), "embed500k": (500_000, 1024), "wide-n": (64, 6830),
          "wide-d": (50_000, 10_000)}
SCALAR = ("wide-n", "wide-d")  # one column per feature; the others hold one vector column


def _spectrum(d: int) -> np.ndarray:
    j = np.arange(d, dtype=float)
    return np.where(j < 20, 40 * 0.85**j, 0.5 * (1 + j / 50) ** -0.5)


def _write(root: str, name: str) -> tuple[list[str], str]:
    n, d = SHAPES[name]
    base = os.path.join(root, name)
    vector = name not in SCALAR
    paths = [os.path.join(base, f"part-{i:02d}.parquet") for i in range({"wide-n": 1, "wide-d": 5}.get(name, 4))]
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
        del x, z
        if name == "wide-d":  # what pandas.to_parquet / pyarrow write_table do by default
            pq.write_table(table, path)
        else:
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


def _child_floor(spec) -> dict:
    """Covariance floor: read + decode every file into one float64 matrix, centre, one ``dsyrk`` Gram.

    BLAS runs on every core.  When ``spec["reference"]`` names a missing file, the leading
    eigenvalues of the Gram / (n - 1) are then found by ARPACK and saved there; that part is
    timed apart (``reference_seconds``) and left out of the floor's figures.
    """
    from scipy.linalg.blas import dsyrk

    t0 = time.perf_counter()
    n, d = SHAPES[spec["case"]]
    x = np.empty((n, d), order="F")
    row = 0
    for p in spec["paths"]:
        t = pq.read_table(p)
        for j, col in enumerate(t.columns):
            x[row:row + t.num_rows, j] = col.to_numpy()
        row += t.num_rows
        del t
    t_read = time.perf_counter() - t0
    x -= x.mean(axis=0)
    c = dsyrk(1.0, x, trans=1)
    out = {"read_seconds": t_read, "gram_seconds": time.perf_counter() - t0 - t_read}
    if spec.get("reference") and not os.path.exists(spec["reference"]):
        from scipy.sparse.linalg import eigsh

        t = time.perf_counter()
        del x
        c = np.triu(c)
        c += np.triu(c, 1).T
        c /= n - 1
        w = eigsh(c, k=spec["k"] + 10, which="LA", tol=1e-13, return_eigenvectors=False)
        np.save(spec["reference"], np.sort(w)[::-1])
        out["reference_seconds"] = time.perf_counter() - t
    return out


def _child(argv) -> int:
    with open(argv[0]) as f:
        spec = json.load(f)
    out = {"sklearn": _child_sklearn, "numpy-svd": _child_numpy_svd, "d2000": _child_d2000,
           "floor": _child_floor}[spec["what"]](spec)
    with open(spec["out"], "w") as f:
        json.dump(out, f)
    return 0


class Runner:
    def __init__(self, scratch: str, code: str = REPO, timeout: float = 1800.0):
        self.scratch = scratch
        self.env = measure.child_env(code)
        self.timeout = timeout
        self.rows = []

    def _run(self, label, argv, spec=None):
        out = os.path.join(self.scratch, f"{label}.json")
        if spec is not None:
            spec = {**spec, "out": out}
            spec_path = os.path.join(self.scratch, f"{label}.spec.json")
            with open(spec_path, "w") as f:
                json.dump(spec, f)
            argv = argv + [spec_path]
        res = measure.run_child(argv, self.env, os.path.join(self.scratch, f"{label}.log"), self.timeout,
                                cwd=self.scratch)
        info = {}
        if spec is not None and os.path.exists(out):
            with open(out) as f:
                info = json.load(f)
        print(f"  {label}: {res.wall_seconds:.1f} s, {res.peak_rss_mb:.0f} MB, others {res.others_cores:.2f} "
              f"cores, exit {res.returncode}", file=sys.stderr)
        return res, info

    def pcapipe(self, label, paths, vector, k, method, **compute):
        cfg = os.path.join(self.scratch, f"{label}.toml")
        inp = {"paths": paths, **({"vector_column": "emb"} if vector else {})}
        from conftest import write_toml

        out_dir = os.path.join(self.scratch, "runs", label)
        write_toml(cfg, {"input": inp, "model": {"components": k, "method": method},
                         "compute": {"scheduler": "threads", "progress": False, **compute},
                         "output": {"directory": out_dir, "scores": False, "overwrite": True,
                                    "report": False}})
        res, _ = self._run(label, [sys.executable, "-m", "pcapipe", "run", cfg])
        man = json.load(open(os.path.join(out_dir, "manifest.json"))) if res.returncode == 0 else {}
        spec = pq.read_table(os.path.join(out_dir, "spectrum.parquet")).to_pydict() if man else {}
        values = [v for v, r in zip(spec.get("eigenvalue", []), spec.get("retained", [])) if r]
        return res, man, values

    def add(self, case, label, res, values, ref, note="", wall=None):
        err = (float(np.max(np.abs(np.asarray(values) / ref[: len(values)] - 1))) if values else float("nan"))
        wall = res.wall_seconds if wall is None else wall
        self.rows.append((case, label, wall, res.cpu_seconds, res.peak_rss_mb, err, res.others_cores, note))


def _table(rows) -> str:
    lines = ["| case | contender | wall s | CPU s | peak RSS MB | max eigenvalue rel. err | others (cores) | note |",
             "|---|---|---|---|---|---|---|---|"]
    for case, label, wall, cpu, rss, err, others, note in rows:
        lines.append(f"| {case} | {label} | {wall:.1f} | {cpu:.1f} | {rss:.0f} | {err:.1e} | {others:.2f} | {note} |")
    return "\n".join(lines)


def _stages(man: dict) -> str:
    """The run's own time per stage (manifest timings), for the note column."""
    t = man.get("timings", {})
    keys = ("plan_seconds", "moments_seconds", "cache_seconds", "decode_seconds", "solver_seconds")
    return ", ".join(f"{k.split('_')[0]} {t[k]:.1f}" for k in keys if t.get(k))


def _wide_d(run: "Runner", me: list, paths: list, base: str, k: int, only: str = "") -> None:
    """50k x 10,000 scalar columns: the covariance floor, auto and each method, two budgets."""
    from pcapipe.layout import FIXED_OVERHEAD

    title = "wide-d 50k x 10,000 f32 scalar, 5 files"
    ref_path = os.path.join(base, "reference-eigsh.npy")
    res, info = run._run("wide-d-floor", me, {"what": "floor", "case": "wide-d", "paths": paths, "k": k,
                                               "reference": ref_path})
    floor = res.wall_seconds - info.get("reference_seconds", 0.0)
    run.add(title, "floor: pyarrow read + decode to float64 + dsyrk Gram", res, [], np.ones(1),
            f"read {info.get('read_seconds', 0):.1f} s, Gram {info.get('gram_seconds', 0):.1f} s", wall=floor)
    ref = np.load(ref_path)
    runs = [("auto", "auto", {}), ("covariance", "covariance", {}), ("matrix-free", "matrix-free", {}),
            ("direct", "direct", {}), ("auto 2GiB x 2", "auto", {"memory_limit": "2GiB", "workers": 2}),
            ("covariance 2GiB x 2", "covariance", {"memory_limit": "2GiB", "workers": 2})]
    for label, method, compute in runs:
        if only and label not in only.split(","):
            continue
        res, man, values = run.pcapipe("wide-d-" + label.replace(" ", "-"), paths, False, k, method, **compute)
        info = man.get("compute", {})
        budget = info.get("workers", 0) * info.get("memory_per_worker", 0)
        note = (f"{res.wall_seconds / floor:.2f}x floor; {_stages(man)}; budget {budget / 2**20:.0f} MiB "
                f"+ {FIXED_OVERHEAD >> 20} MiB" if man else (res.stderr.strip().splitlines() or [""])[-1][:200])
        if label.startswith("auto") and man:
            note += f"; picked {man.get('method')}: {man.get('method_reason', '')}"
        run.add(title, f"pcapipe {label}", res, values, ref, note)


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if argv and argv[0] == "--child":
        return _child(argv[1:])
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", default="d2000,wide-n,embed100k,embed500k,wide-d")
    ap.add_argument("--ks", default="10,100,256")
    ap.add_argument("--scratch", default=os.path.join(tempfile.gettempdir(), "pcapipe-methods-bench"))
    ap.add_argument("--code", default=REPO, help="the pcapipe checkout the contenders import")
    ap.add_argument("--timeout", type=float, default=1800.0, help="seconds per contender")
    ap.add_argument("--wide-runs", default="", help="wide-d: only these pcapipe runs, e.g. 'auto,auto 2GiB x 2'")
    args = ap.parse_args(argv)
    os.makedirs(os.path.join(args.scratch, "runs"), exist_ok=True)
    sys.path.insert(0, os.path.join(REPO, "tests"))
    run = Runner(args.scratch, os.path.abspath(args.code), args.timeout)
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
        if case == "wide-d":
            _wide_d(run, me, paths, base, 10, args.wide_runs)
            continue
        vector = case not in SCALAR
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
