import numpy as np, pyarrow as pa, pyarrow.parquet as pq, os, pcapipe
rng = np.random.default_rng(20261202)
os.makedirs("/tmp/names_fx/data", exist_ok=True)
for f in range(2):
    n = 30
    z = rng.normal(size=(n, 2))
    x = z @ np.array([[2.0, 1.0, 0.5, 0.0], [0.0, 0.5, -1.0, 1.5]]) + 0.3 * rng.normal(size=(n, 4))
    t = pa.table({"probe": [f"p{f}-{i:02d}" for i in range(n)], **{f"ch_{j}": x[:, j] + 10 * j for j in range(4)}})
    pq.write_table(t, f"/tmp/names_fx/data/part-{f}.parquet")
res = pcapipe.run({"input": {"paths": ["/tmp/names_fx/data/*.parquet"], "keep": ["probe"]},
                   "model": {"components": 2, "method": "covariance"},
                   "compute": {"scheduler": "synchronous", "progress": False},
                   "output": {"directory": "/tmp/names_fx/run_v1", "report": False, "overwrite": True}})
print(res)
