"""Generate the gridded-field example: monthly temperature anomalies on a latitude-longitude grid.

The data are invented for the weights example (``configs/grid.toml``).  An
imaginary ocean planet is observed once a month on a regular 10 x 20 degree
grid (17 latitudes from 80 S to 80 N, 18 longitudes); each grid point is one
feature ``t_<lat>_<lon>`` (e.g. ``t_s60_e040``, ``t_n00_e180``).  Two hidden
patterns drive the anomalies, plus independent noise at every point::

    x[t, p] = a[t] * polar[p] + b[t] * tropical[p] + noise_sd * e[t, p]

* ``polar``: an ice-edge seesaw, +1 poleward of 55 N and -1 poleward of 55 S,
  larger per point (amplitude sd 1.1) but confined to the high latitudes;
* ``tropical``: a wave-number-one dipole between 35 S and 35 N, smaller per
  point (sd 1.0) but covering far more of the planet's area.

Grid points crowd together towards the poles (a cell's area shrinks like the
cosine of its latitude), so an unweighted PCA counts the polar pattern about
as many times as the tropical one although it covers a fraction of the area:
it comes out first.  Weighting every point by ``sqrt(cos(latitude))``
(Hannachi, Jolliffe & Stephenson 2007, Int. J. Climatol. 27, sec. 3.1) makes
the covariance area-weighted, and the tropical pattern comes first.

Each monthly row also carries ``days``, the days in its month: monthly means
stand for that many daily fields, so ``input.row_weight = "days"`` weights
the months by their length (frequency weights).

Writes ``grid-000.parquet`` ... into ``--out`` (default ``data_demo/grid``),
and ``grid_weights.csv`` (feature, weight) beside them.  About 0.4 MB.

Usage::

    python data_demo/make_grid.py                 # the example's data
    python data_demo/make_grid.py --months 600 --out /tmp/grid
"""

from __future__ import annotations

import argparse
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

__all__ = ["LATITUDES", "LONGITUDES", "feature_name", "patterns", "grid_weights", "make_rows", "write_grid",
           "main"]

LATITUDES = np.arange(-80, 81, 10)    # degrees north
LONGITUDES = np.arange(0, 360, 20)    # degrees east
POLAR_SD, TROPICAL_SD, NOISE_SD = 1.1, 1.0, 0.4
_DAYS = np.array([31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31])


def feature_name(lat: int, lon: int) -> str:
    """``t_s60_e040``: hemisphere letter and degrees, then degrees east."""
    return f"t_{'s' if lat < 0 else 'n'}{abs(int(lat)):02d}_e{int(lon):03d}"


def _grid():
    lat, lon = np.meshgrid(LATITUDES, LONGITUDES, indexing="ij")
    return lat.ravel(), lon.ravel()


def patterns() -> tuple[np.ndarray, np.ndarray]:
    """The two planted spatial patterns (polar seesaw, tropical dipole), one value per grid point."""
    lat, lon = _grid()
    polar = np.where(lat >= 55, 1.0, np.where(lat <= -55, -1.0, 0.0))
    tropical = np.where(np.abs(lat) <= 35, np.cos(np.radians(lon)), 0.0)
    return polar, tropical


def grid_weights() -> tuple[list[str], np.ndarray]:
    """Feature names and their weights sqrt(cos(latitude)) (area weighting of the covariance)."""
    lat, lon = _grid()
    names = [feature_name(a, o) for a, o in zip(lat, lon)]
    return names, np.sqrt(np.cos(np.radians(lat)))


def make_rows(months: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """``(x, days)``: the anomaly field of each month and the days in that month."""
    rng = np.random.default_rng(seed)
    polar, tropical = patterns()
    a = rng.standard_normal(months) * POLAR_SD
    b = rng.standard_normal(months) * TROPICAL_SD
    x = np.outer(a, polar) + np.outer(b, tropical) + NOISE_SD * rng.standard_normal((months, polar.size))
    return x, _DAYS[np.arange(months) % 12]


def write_grid(out: str, months: int = 240, files: int = 4, seed: int = 2007) -> list[str]:
    """Write the Parquet files and ``grid_weights.csv`` into ``out``; returns the Parquet paths."""
    os.makedirs(out, exist_ok=True)
    names, weights = grid_weights()
    x, days = make_rows(months, seed)
    bounds = np.linspace(0, months, files + 1).astype(int)
    paths = []
    for i in range(files):
        sl = slice(bounds[i], bounds[i + 1])
        cols = {"month": pa.array(np.arange(months)[sl], pa.int32()), "days": pa.array(days[sl], pa.int16())}
        cols.update({n: x[sl, j] for j, n in enumerate(names)})
        path = os.path.join(out, f"grid-{i:03d}.parquet")
        pq.write_table(pa.table(cols), path, compression="zstd")
        paths.append(path)
    with open(os.path.join(out, "grid_weights.csv"), "w") as f:
        f.write("feature,weight\n")
        f.writelines(f"{n},{float(w)!r}\n" for n, w in zip(names, weights))
    return paths


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=os.path.join(os.path.dirname(os.path.abspath(__file__)), "grid"))
    ap.add_argument("--months", type=int, default=240)
    ap.add_argument("--files", type=int, default=4)
    ap.add_argument("--seed", type=int, default=2007)
    args = ap.parse_args(argv)
    paths = write_grid(args.out, args.months, args.files, args.seed)
    print(f"wrote {len(paths)} files and grid_weights.csv to {args.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
