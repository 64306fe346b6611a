"""Generate the pcapipe demo dataset: telemetry from a fleet of reefer containers.

The data are invented for the demo.  A fleet of 40 refrigerated shipping
containers ("reefers") logs 24 sensor channels every 5 minutes.  Every channel
is a linear mix of five hidden drivers plus its own noise, then given a unit,
a large offset and the resolution of a plausible sensor::

    z[t, c, j] = sum_k loading[j, k] * driver[t, c, k] + sqrt(psi[j]) * noise[t, c, j]
    x[t, c, j] = round(offset[j] + scale[j] * z[t, c, j], resolution[j])

with every driver of unit variance and ``psi[j] = 1 - sum_k loading[j, k]**2``,
so ``z`` has unit variance and the correlation matrix of the channels is close
to ``loading @ loading.T + diag(psi)``: five eigenvalues well above one, then
a gap.  See ``data_demo/README.md`` for the scenario and the loading pattern.

Three containers develop an invented fault partway through (``FAULTS``): from
a given step some of their channels drift, linearly over a day, in a way the
drivers do not explain (a sagging compressor phase, a leaking door seal, a
worn condenser fan), so monitoring with T^2 and SPE can find them.

Rows are written time step by time step (all 40 containers per step), chunk by
chunk, through :class:`pyarrow.parquet.ParquetWriter`, so memory stays bounded
whatever ``--rows`` is.  The random draws happen in chunks of a fixed number of
time steps, so for one seed the first N rows are the same whatever ``--rows``,
``--files`` or ``--row-group`` are.

Usage::

    python data_demo/make_demo.py                       # the bundled set
    python data_demo/make_demo.py --rows 10000000 --files 64 --row-group 100000 --out /data/reefer
"""

from __future__ import annotations

import argparse
import json
import logging
import math
import os
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from scipy.signal import lfilter

__all__ = ["DRIVERS", "Channel", "CHANNELS", "Fault", "FAULTS", "build_schema", "write_dataset", "main"]

logger = logging.getLogger("pcapipe")

DRIVERS = ("heat_load", "compressor_duty", "defrost", "engine_vibration", "fresh_air")

N_CONTAINERS = 40
INTERVAL_S = 300
START_MS = 1772409600000  # 2026-03-02T00:00:00Z; timestamps are UTC, stored without a zone
STEPS_PER_CHUNK = 256  # fixed, so the data do not depend on the file or row-group layout
STEPS_PER_HOUR = 3600 // INTERVAL_S
DEFROST_PERIOD = 6 * STEPS_PER_HOUR
DEFROST_LENGTH = STEPS_PER_HOUR // 2
VOYAGE_STEPS = (5 * 24 * STEPS_PER_HOUR, 12 * 24 * STEPS_PER_HOUR)  # 5 to 12 days at sea
FRESH_AIR_LEVEL_VAR = 0.7  # share of the fresh-air driver set per voyage (vent setting for the cargo)

DEFAULT_ROWS = 120_000
DEFAULT_FILES = 8
DEFAULT_ROW_GROUP = 5_000
DEFAULT_SEED = 20261201
FILE_PATTERN = re.compile(r"reefer-(\d{3,})\.parquet")


@dataclass(frozen=True)
class Channel:
    """One sensor channel: unit, offset, spread, logging resolution, driver loadings."""

    name: str
    unit: str
    offset: float
    scale: float
    resolution: float
    loadings: tuple[float, ...]


def _ch(name: str, unit: str, offset: float, scale: float, resolution: float, **loadings: float) -> Channel:
    unknown = set(loadings) - set(DRIVERS)
    if unknown:
        raise ValueError(f"channel {name}: unknown drivers {sorted(unknown)}")
    row = tuple(loadings.get(d, 0.0) for d in DRIVERS)
    if sum(v * v for v in row) >= 0.99:
        raise ValueError(f"channel {name}: loadings leave no room for channel noise")
    return Channel(name, unit, offset, scale, resolution, row)


# Offsets are large next to the spreads on purpose (kelvin, hundreds of volts,
# kPa, ppm): a PCA that forgets to centre, or centres with a cancelling
# formula, gets visibly wrong answers on this table.
CHANNELS = (
    _ch("compressor_amp_a", "A", 12.0, 1.8, 0.05, compressor_duty=0.92, heat_load=0.20),
    _ch("compressor_amp_b", "A", 12.2, 1.8, 0.05, compressor_duty=0.90, heat_load=0.22),
    _ch("compressor_amp_c", "A", 11.9, 1.9, 0.05, compressor_duty=0.91, heat_load=0.18),
    _ch("supply_voltage", "V", 400.0, 4.0, 0.1, compressor_duty=-0.60, engine_vibration=0.25),
    _ch("condenser_fan_amp", "A", 1.6, 0.25, 0.01, heat_load=0.80),
    _ch("evaporator_fan_amp", "A", 0.85, 0.06, 0.002, defrost=-0.75, fresh_air=0.30),
    _ch("ambient_temp", "K", 301.0, 4.5, 0.1, heat_load=0.95),
    _ch("supply_air_temp", "K", 271.5, 0.6, 0.02, compressor_duty=-0.60, defrost=0.60),
    _ch("return_air_temp", "K", 274.8, 0.9, 0.02, heat_load=0.50, defrost=0.45, fresh_air=0.35),
    _ch("coil_temp_in", "K", 264.0, 2.5, 0.05, defrost=0.85, compressor_duty=-0.35),
    _ch("coil_temp_out", "K", 267.5, 2.2, 0.05, defrost=0.80, compressor_duty=-0.30),
    _ch("condenser_temp", "K", 316.0, 5.0, 0.1, heat_load=0.80, compressor_duty=0.30),
    _ch("discharge_temp", "K", 342.0, 7.0, 0.2, compressor_duty=0.85, heat_load=0.25),
    _ch("suction_pressure", "kPa", 145.0, 12.0, 0.5, compressor_duty=-0.65, defrost=0.55),
    _ch("discharge_pressure", "kPa", 1520.0, 140.0, 5.0, heat_load=0.80, compressor_duty=0.30),
    _ch("door_seal_humidity", "%RH", 84.0, 4.0, 0.1, fresh_air=-0.60, defrost=0.40),
    _ch("cargo_humidity", "%RH", 91.0, 2.5, 0.1, fresh_air=-0.80),
    _ch("co2_ppm", "ppm", 2200.0, 400.0, 10.0, fresh_air=-0.85),
    _ch("o2_percent", "%", 19.2, 0.6, 0.02, fresh_air=0.85),
    _ch("vib_low_band", "mm/s", 2.8, 0.5, 0.01, engine_vibration=0.90),
    _ch("vib_mid_band", "mm/s", 1.4, 0.25, 0.01, engine_vibration=0.80),
    _ch("vib_high_band", "mm/s", 0.6, 0.1, 0.002, engine_vibration=0.60, compressor_duty=0.45),
    _ch("frame_accel_z", "m/s2", 9.81, 0.15, 0.005, engine_vibration=0.60),
    _ch("defrost_heater_amp", "A", 2.5, 2.5, 0.05, defrost=0.99),
)



@dataclass(frozen=True)
class Fault:
    """An invented fault: from ``start_step`` one container's channels drift away from the model.

    ``shifts`` maps channel names to the drift reached after ``ramp_steps``,
    in standard units of the channel; the drift grows linearly until then.
    The shifts break the usual co-movement of the channels (the drivers do
    not explain them), so the rows leave the model plane: the SPE rises.
    """

    container: int          # 1-based: RC-007 is 7
    kind: str
    start_step: int
    ramp_steps: int
    shifts: tuple[tuple[str, float], ...]


# Three containers go wrong partway through the bundled ten days (3000 steps).
FAULTS = (
    # a failing compressor: one phase's current sags, the other two and the discharge temperature rise
    Fault(7, "failing compressor (phase B winding)", 1500, 288,
          (("compressor_amp_b", -3.0), ("compressor_amp_a", 1.0), ("compressor_amp_c", 1.0),
           ("discharge_temp", 2.0))),
    # a leaking door seal: humid outside air gets in, humidity rises while CO2 falls
    Fault(23, "leaking door seal", 2000, 288,
          (("door_seal_humidity", 3.5), ("cargo_humidity", 2.0), ("co2_ppm", -1.0), ("return_air_temp", 1.0))),
    # a condenser fan wearing out: less current, hotter condenser and higher head pressure
    Fault(31, "condenser fan wearing out", 2400, 288,
          (("condenser_fan_amp", -3.0), ("condenser_temp", 1.5), ("discharge_pressure", 1.5))),
)

_LOADINGS = np.array([c.loadings for c in CHANNELS])
_NOISE_SD = np.sqrt(1.0 - (_LOADINGS**2).sum(axis=1))
_OFFSET = np.array([c.offset for c in CHANNELS])
_SCALE = np.array([c.scale for c in CHANNELS])
_RESOLUTION = np.array([c.resolution for c in CHANNELS])
# Decimal places of each resolution, so 271.3 is stored as the double nearest 271.3.
_DECIMALS = [max(0, 1 - math.floor(math.log10(c.resolution))) for c in CHANNELS]


def build_schema(seed: int) -> pa.Schema:
    """Arrow schema of the demo files: three identifier columns, then the float64 channels."""
    fields = [
        pa.field("container_id", pa.string(), nullable=False),
        pa.field("timestamp", pa.timestamp("ms"), nullable=False, metadata={"timezone": "UTC"}),
        pa.field("voyage", pa.int16(), nullable=False),
    ]
    fields += [pa.field(c.name, pa.float64(), nullable=False, metadata={"unit": c.unit}) for c in CHANNELS]
    faults = [{"container": f"RC-{f.container:03d}", "kind": f.kind, "start_step": f.start_step,
               "ramp_steps": f.ramp_steps, "channels": [n for n, _ in f.shifts]} for f in FAULTS]
    about = {"generator": "data_demo/make_demo.py", "seed": seed, "drivers": list(DRIVERS), "invented": True,
             "faults": faults}
    return pa.schema(fields, metadata={"pcapipe.demo": json.dumps(about)})


class _Ar1:
    """Stationary AR(1) series for every container, with its state carried across chunks."""

    def __init__(self, rng: np.random.Generator, tau_steps: float, variance: float) -> None:
        self._rng = rng
        self._phi = math.exp(-1.0 / tau_steps)
        self._innovation_sd = math.sqrt(variance * (1.0 - self._phi**2))
        # Start from the stationary law, so the first rows look like the rest.
        self._zi = self._phi * rng.normal(0.0, math.sqrt(variance), (1, N_CONTAINERS))

    def draw(self, n_steps: int) -> np.ndarray:
        e = self._rng.standard_normal((n_steps, N_CONTAINERS)) * self._innovation_sd
        y, self._zi = lfilter([1.0], [1.0, -self._phi], e, axis=0, zi=self._zi)
        return y


class _Fleet:
    """The hidden state of the fleet; each :meth:`chunk` advances it by STEPS_PER_CHUNK steps."""

    def __init__(self, rng: np.random.Generator, schema: pa.Schema) -> None:
        self._rng = rng
        self._schema = schema
        self._step = 0
        self._ids = np.array([f"RC-{i:03d}" for i in range(1, N_CONTAINERS + 1)], dtype=object)
        # Logger clocks are not synchronised: each container logs at its own second.
        self._clock_ms = rng.integers(0, INTERVAL_S, N_CONTAINERS) * 1000
        self._diurnal_phase = rng.uniform(0.0, 2.0 * math.pi, N_CONTAINERS)
        self._defrost_phase = rng.integers(0, DEFROST_PERIOD, N_CONTAINERS)
        self._voyage = rng.integers(1, 7, N_CONTAINERS)
        # Logging starts part-way through each container's current voyage.
        lengths = [rng.integers(*VOYAGE_STEPS) for _ in range(N_CONTAINERS)]
        self._steps_left = np.array([rng.integers(1, n) for n in lengths])
        self._level = rng.normal(0.0, math.sqrt(FRESH_AIR_LEVEL_VAR), N_CONTAINERS)
        hour = STEPS_PER_HOUR
        self._weather = _Ar1(rng, 12 * hour, 0.5)
        self._duty = _Ar1(rng, 0.75 * hour, 1.0)
        self._sea = _Ar1(rng, 3 * hour, 1.0)
        self._vent = _Ar1(rng, 24 * hour, 1.0 - FRESH_AIR_LEVEL_VAR)

    def _voyages(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        voyage = np.empty((n, N_CONTAINERS), dtype=np.int16)
        level = np.empty((n, N_CONTAINERS))
        for c in range(N_CONTAINERS):
            pos = 0
            while pos < n:
                m = min(int(self._steps_left[c]), n - pos)
                voyage[pos : pos + m, c] = self._voyage[c]
                level[pos : pos + m, c] = self._level[c]
                pos += m
                self._steps_left[c] -= m
                if self._steps_left[c] == 0:
                    # Port call: a new voyage with new cargo and a new vent setting.
                    self._voyage[c] += 1
                    self._steps_left[c] = self._rng.integers(*VOYAGE_STEPS)
                    self._level[c] = self._rng.normal(0.0, math.sqrt(FRESH_AIR_LEVEL_VAR))
        return voyage, level

    def _drivers(self, steps: np.ndarray, level: np.ndarray) -> np.ndarray:
        n = steps.size
        # Day/night cycle (variance 1/2) plus weather (variance 1/2): unit variance.
        day = np.sin(2.0 * math.pi * steps[:, None] / (24 * STEPS_PER_HOUR) + self._diurnal_phase)
        heat = day + self._weather.draw(n)
        duty = self._duty.draw(n)
        # Defrost runs DEFROST_LENGTH steps every DEFROST_PERIOD; standardise the 0/1 signal.
        p = DEFROST_LENGTH / DEFROST_PERIOD
        on = ((steps[:, None] + self._defrost_phase) % DEFROST_PERIOD) < DEFROST_LENGTH
        defrost = (on - p) / math.sqrt(p * (1.0 - p))
        vibration = self._sea.draw(n)
        fresh = level + self._vent.draw(n)
        return np.stack([heat, duty, defrost, vibration, fresh], axis=-1)

    def chunk(self) -> pa.Table:
        n = STEPS_PER_CHUNK
        steps = self._step + np.arange(n)
        self._step += n
        voyage, level = self._voyages(n)
        drivers = self._drivers(steps, level)
        noise = self._rng.standard_normal((n, N_CONTAINERS, len(CHANNELS)))
        z = drivers @ _LOADINGS.T + noise * _NOISE_SD
        _apply_faults(z, steps)
        x = np.round((_OFFSET + _SCALE * z) / _RESOLUTION) * _RESOLUTION
        x = x.reshape(-1, len(CHANNELS))
        ts = START_MS + steps[:, None] * (INTERVAL_S * 1000) + self._clock_ms
        arrays = [
            pa.array(np.tile(self._ids, n), type=pa.string()),
            pa.array(ts.ravel(), type=pa.timestamp("ms")),
            pa.array(voyage.ravel(), type=pa.int16()),
        ]
        arrays += [pa.array(np.round(x[:, j], d)) for j, d in enumerate(_DECIMALS)]
        return pa.Table.from_arrays(arrays, schema=self._schema)


def _apply_faults(z: np.ndarray, steps: np.ndarray) -> None:
    """Add each fault's drift to its container's rows (z: steps x containers x channels, in place).

    The drift depends only on the step number, never on random draws, so the
    rest of the data is the same with or without faults.
    """
    names = [c.name for c in CHANNELS]
    for f in FAULTS:
        ramp = np.clip((steps - f.start_step + 1) / f.ramp_steps, 0.0, 1.0)
        for name, shift in f.shifts:
            z[:, f.container - 1, names.index(name)] += ramp * shift


class _RowStream:
    """Hands out exactly the number of rows asked for, generating chunks as needed."""

    def __init__(self, fleet: _Fleet, schema: pa.Schema) -> None:
        self._fleet = fleet
        self._buffer = schema.empty_table()

    def take(self, n_rows: int) -> pa.Table:
        while self._buffer.num_rows < n_rows:
            self._buffer = pa.concat_tables([self._buffer, self._fleet.chunk()])
        out = self._buffer.slice(0, n_rows).combine_chunks()
        self._buffer = self._buffer.slice(n_rows).combine_chunks()
        return out


def _file_sizes(rows: int, files: int) -> list[int]:
    base, extra = divmod(rows, files)
    return [base + (i < extra) for i in range(files)]


def _remove_stale(out: Path, files: int) -> None:
    # A smaller regeneration must not leave old files for a glob to pick up.
    for path in sorted(out.iterdir()):
        match = FILE_PATTERN.fullmatch(path.name)
        if match and int(match.group(1)) >= files:
            logger.info("removing stale %s", path)
            path.unlink()


def write_dataset(out: Path, rows: int, files: int, row_group: int, seed: int) -> list[Path]:
    """Write ``rows`` rows into ``files`` Parquet files ``reefer-000.parquet``... under ``out``.

    Parameters
    ----------
    out : Path
        Target directory, created if missing.  Files ``reefer-NNN.parquet``
        beyond ``files`` are removed.
    rows, files, row_group : int
        Total rows, number of files (rows split as evenly as possible, in time
        order) and rows per row group.
    seed : int
        Seed of ``numpy.random.default_rng``.

    Returns
    -------
    list of Path
        The files written, in row order.

    Raises
    ------
    ValueError
        If a count is not positive or there are fewer rows than files.

    Notes
    -----
    Memory is bounded by one row group plus one chunk of 256 time steps
    (10 240 rows), independent of ``rows``.
    """
    if min(rows, files, row_group) < 1 or rows < files:
        raise ValueError(f"need rows >= files >= 1 and row_group >= 1, got {rows=}, {files=}, {row_group=}")
    out.mkdir(parents=True, exist_ok=True)
    schema = build_schema(seed)
    stream = _RowStream(_Fleet(np.random.default_rng(seed), schema), schema)
    paths = []
    for i, n_file in enumerate(_file_sizes(rows, files)):
        path = out / f"reefer-{i:03d}.parquet"
        tmp = path.with_name(path.name + ".tmp")
        with pq.ParquetWriter(tmp, schema, compression="zstd", compression_level=9) as writer:
            left = n_file
            while left:
                m = min(row_group, left)
                writer.write_table(stream.take(m), row_group_size=m)
                left -= m
        os.replace(tmp, path)  # a crash never leaves a half-written file under the final name
        logger.info("wrote %s: %d rows, %.2f MB", path, n_file, path.stat().st_size / 1e6)
        paths.append(path)
    _remove_stale(out, files)
    return paths


def _parse_args(argv: list[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(
        description="Generate the invented reefer-fleet demo data as Parquet files reefer-NNN.parquet."
    )
    add = parser.add_argument
    add("--rows", type=int, default=DEFAULT_ROWS, help="total rows (default %(default)s)")
    add("--files", type=int, default=DEFAULT_FILES, help="number of files (default %(default)s)")
    add("--row-group", type=int, default=DEFAULT_ROW_GROUP, help="rows per row group (default %(default)s)")
    add(
        "--out",
        type=Path,
        default=Path(__file__).resolve().parent,
        help="output directory, default: next to this script; reefer-NNN.parquet files beyond --files are removed",
    )
    add("--seed", type=int, default=DEFAULT_SEED, help="random seed (default %(default)s)")
    args = parser.parse_args(argv)
    if min(args.rows, args.files, args.row_group) < 1 or args.rows < args.files:
        parser.error("need --rows >= --files >= 1 and --row-group >= 1")
    return args


def main(argv: list[str] | None = None) -> int:
    """Command line entry point; returns the exit status."""
    args = _parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="%(message)s")
    paths = write_dataset(args.out, args.rows, args.files, args.row_group, args.seed)
    total = sum(p.stat().st_size for p in paths)
    logger.info("%d files, %d rows, %.2f MB in %s", len(paths), args.rows, total / 1e6, args.out)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
