"""Generating a panel folder: blocks of depots, ordered files, truth.json, atomic rename."""

import contextlib
from concurrent.futures import ThreadPoolExecutor
import json
import os
import shutil
from pathlib import Path

import numpy as np

from . import model
from .errors import DatagenError
from .files import PartWriter, read_spool, unit_pieces, write_spool
from .options import Options

GENERATOR_VERSION = 1
TRUTH_FILE = "truth.json"
# Rows simulated at once; a block's arrays take about 100 bytes per row.
BLOCK_ROWS = 1_000_000


def generate(out_dir, n_units, n_periods, *, seed=Options.seed, unbalanced=Options.unbalanced,
             gaps=Options.gaps, order=Options.order, rows_per_file=Options.rows_per_file,
             row_group_size=Options.row_group_size, compression=Options.compression, overwrite=False):
    """Write a synthetic depot-by-month panel as Parquet files plus truth.json.

    The rows depend only on `seed`, `n_units`, `n_periods`, `unbalanced` and `gaps`;
    the remaining options change how they are laid out in files.

    Parameters
    ----------
    out_dir : str or Path
        Folder to create (an existing empty folder is fine). It is written under a
        temporary name and renamed when complete.
    n_units, n_periods : int
        Depots and months before rows are removed.
    seed : int, default 0
    unbalanced : float, default 0.0
        Share of depots that enter late or leave early (observed for n_periods // 2 to
        n_periods - 1 consecutive months).
    gaps : float, default 0.0
        Share of depots with one month missing inside their span (depots observed for
        fewer than 3 months have none).
    order : {"unit", "period"}, default "unit"
        "unit": rows sorted by depot then month, each file a contiguous range of whole
        depots. "period": sorted by month then depot.
    rows_per_file : int, default 2_000_000
        Upper bound on rows per file (a single depot with more rows gets a file of its own).
    row_group_size : int, default 100_000
    compression : {"snappy", "zstd", "none"}, default "snappy"
    overwrite : bool, default False
        Replace `out_dir` if it holds a panel made by this generator (one with truth.json).

    Returns
    -------
    Path
        The output folder, holding part-00000.parquet, ... and truth.json.

    Raises
    ------
    DatagenError
        For a bad option, or when `out_dir` is not empty and either `overwrite` is false
        or it holds no truth.json.
    """
    options = Options(n_units, n_periods, seed, unbalanced, gaps, order, rows_per_file,
                      row_group_size, compression)
    out = Path(out_dir)
    _check_replaceable(out, overwrite)
    with _staging(out) as folder:
        writer = PartWriter(folder, rows_per_file, row_group_size, compression)
        write = _write_by_unit if order == "unit" else _write_by_period
        tally = write(options, folder, writer)
        files = writer.close()
        truth = _truth(options, tally, files)
        (folder / TRUTH_FILE).write_text(json.dumps(truth, indent=2) + "\n")
    return out


def ensure(out_dir, **options):
    """Return `out_dir`, generating it only if it lacks a panel made with these options.

    Parameters
    ----------
    out_dir : str or Path
    **options
        Keyword arguments of `generate` (except `overwrite`).

    Returns
    -------
    Path

    Raises
    ------
    DatagenError
        For a bad option, or when `out_dir` is not empty and holds no truth.json (it is
        not a generated panel and is left alone).
    """
    wanted = Options(**options).as_dict()
    out = Path(out_dir)
    if (out / TRUTH_FILE).is_file():
        truth = load_truth(out)
        if truth["generator_version"] == GENERATOR_VERSION and truth["options"] == wanted:
            return out
    return generate(out, overwrite=True, **options)


def load_truth(out_dir):
    """Return the parsed truth.json of a generated panel folder."""
    return json.loads((Path(out_dir) / TRUTH_FILE).read_text())


def _check_replaceable(out, overwrite):
    """Refuse to replace a file, a foreign folder, or any non-empty folder without `overwrite`."""
    if not out.exists() and not out.is_symlink():
        return
    if not out.is_dir():
        raise DatagenError(f"Output path {out} is a file, not a folder. Choose another path.")
    if not any(out.iterdir()):
        return
    if not (out / TRUTH_FILE).is_file():
        raise DatagenError(f"Output folder {out} is not empty and has no {TRUTH_FILE}, so it is not a "
                           "generated panel and is left alone. Remove it or choose another folder.")
    if not overwrite:
        raise DatagenError(f"Output folder {out} already exists. Pass overwrite=True (--overwrite) "
                           "or choose another folder.")


@contextlib.contextmanager
def _staging(out):
    """Yield a temporary sibling folder; on success it replaces `out`, on failure it is removed."""
    out.parent.mkdir(parents=True, exist_ok=True)
    folder = out.parent / f".{out.name}.partial-{os.getpid()}"
    shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir()
    try:
        yield folder
    except BaseException:
        shutil.rmtree(folder, ignore_errors=True)
        raise
    old = out.parent / f".{out.name}.old-{os.getpid()}"
    if out.exists():
        out.rename(old)
    folder.rename(out)
    shutil.rmtree(old, ignore_errors=True)


def _blocks(options):
    """Yield the panel's blocks in depot order; each block has its own random stream."""
    n_periods = options.n_periods
    block_units = max(1, BLOCK_ROWS // n_periods)
    regions = model.simulate_regions(_rng(options.seed, 0), model.n_regions(options.n_units), n_periods)
    for index, first in enumerate(range(0, options.n_units, block_units)):
        n_depots = min(block_units, options.n_units - first)
        yield model.simulate_block(_rng(options.seed, 1, index), _rng(options.seed, 2, index),
                                   first + 1, n_depots, n_periods, regions,
                                   options.unbalanced, options.gaps)


def _rng(seed, *key):
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=key)))


def _in_background(items, consume):
    """Call consume(item) for each item in a worker thread while the next item is produced.

    numpy simulation and Parquet encoding both release the GIL, so the two cores share the work.
    """
    with ThreadPoolExecutor(max_workers=1) as pool:
        pending = None
        for item in items:
            if pending is not None:
                pending.result()
            pending = pool.submit(consume, item)
        if pending is not None:
            pending.result()


def _write_by_unit(options, folder, writer):
    tally = _Tally()

    def pieces():
        for block in _blocks(options):
            tally.add(block)
            yield list(unit_pieces(block, options.rows_per_file))

    _in_background(pieces(), lambda tables: [writer.write(table) for table in tables])
    return tally


def _write_by_period(options, folder, writer):
    """Spool each block by month, then write month by month across the spooled blocks."""
    spool = folder / "spool"
    spool.mkdir()
    tally = _Tally()
    paths = []

    def blocks():
        for index, block in enumerate(_blocks(options)):
            tally.add(block)
            paths.append(spool / f"block-{index:05d}.arrow")
            yield paths[-1], block

    _in_background(blocks(), lambda item: write_spool(*item, options.n_periods))
    piece_rows = min(options.rows_per_file, options.row_group_size)
    for month in range(options.n_periods):
        for path in paths:
            rows = read_spool(path, month)
            for first in range(0, rows.num_rows, piece_rows):
                writer.write(rows.slice(first, piece_rows))
    shutil.rmtree(spool)
    return tally


class _Tally:
    """Counts and depot-effect moments accumulated over blocks (sums shifted for accuracy)."""

    _EFFECT_SHIFT, _STAFF_SHIFT = 600.0, 160.0

    def __init__(self):
        self.n_rows = self.n_unbalanced = self.n_gaps = 0
        self.n_depots = 0
        self.sums = np.zeros(5)  # a, m, a*a, m*m, a*m with m the depot's mean staff_hours

    def add(self, block):
        present = block.present
        counts = present.sum(axis=1)
        first = present.argmax(axis=1)
        last = present.shape[1] - 1 - present[:, ::-1].argmax(axis=1)
        self.n_rows += int(counts.sum())
        self.n_depots += counts.size
        self.n_unbalanced += int(np.count_nonzero((first > 0) | (last < present.shape[1] - 1)))
        self.n_gaps += int(np.count_nonzero(counts < last - first + 1))
        a = block.effect - self._EFFECT_SHIFT
        m = (block.values["staff_hours"] * present).sum(axis=1) / counts - self._STAFF_SHIFT
        self.sums += [a.sum(), m.sum(), a @ a, m @ m, a @ m]

    def effect_summary(self):
        n = self.n_depots
        mean_a, mean_m = self.sums[:2] / n
        var_a = self.sums[2] / n - mean_a**2
        var_m = self.sums[3] / n - mean_m**2
        cov = self.sums[4] / n - mean_a * mean_m
        return {"mean": mean_a + self._EFFECT_SHIFT, "sd": float(np.sqrt(var_a)),
                "corr_with_depot_mean_staff_hours": float(cov / np.sqrt(var_a * var_m))}


def _truth(options, tally, files):
    truth = {"generator_version": GENERATOR_VERSION, "options": options.as_dict(),
             **model.describe(options.n_periods)}
    truth["depot_effect"].update(tally.effect_summary())
    return {
        **truth,
        "n_rows": tally.n_rows,
        "n_units": options.n_units,
        "n_periods": options.n_periods,
        "n_regions": model.n_regions(options.n_units),
        "n_unbalanced_units": tally.n_unbalanced,
        "n_gap_units": tally.n_gaps,
        "files": [{"name": name, "rows": rows} for name, rows in files],
    }
