"""Where IRLS gets its sufficient statistics: one interface, two ways to compute them.

- `SqlAggregateSource`: one aggregate query per pass (`sqlgen.statistics.statistics_query`); runs on
  every engine and only the p x p sums leave it.
- `BatchSource`: the design columns arrive in batches (streamed from DuckDB with `fetch_batches`, read
  back from a `LocalCopy` of them, or slices of in-memory arrays) and X'WX is accumulated per batch with
  BLAS (a rank-k update of the upper triangle), so memory holds one batch whatever the row count.

Both evaluate several linear predictors (the model and its intercept-only null model) in one pass.
Coefficients are on the standardized scale: term t enters as (x - center) / scale.
"""

from __future__ import annotations

import contextlib
import math
import tempfile
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, replace
from functools import cache, partial
from typing import Protocol

import numpy as np
import pyarrow as pa
from scipy.linalg.blas import dsyrk
from sqlglot import exp
from threadpoolctl import ThreadpoolController

from ..compiler.layout import DesignLayout
from ..engines.base import Engine
from ..sqlgen.common import alias
from ..sqlgen.first_pass import first_pass_query, profile_width
from ..sqlgen.statistics import (
    ModelRequest,
    TrainingProfile,
    design_columns_query,
    read_profile,
    statistics_query,
    target_counts_query,
    term_profile,
    upper_pairs,
)
from .families import BOUNDARY_ETA, Family

# Rows of a batch worked on at once. A pass takes several steps over the same rows (standardize, the
# linear predictor, the family, the weighted copy, X'WX); on a block this size their matrices stay in
# the processor's cache from one step to the next (16,384 rows x 25 terms: 3.3 MB each) instead of
# going out to memory and back. Measured on this project's 2-core machine (2.5 MB L2, 48 MB L3), one
# thread, the arithmetic of a binomial pass over 10M rows: 25 terms 2.78 s in 131,072-row blocks (the
# streamed batch), 1.54 s in 16,384-row blocks (8,192: 1.54 s, 4,096: 1.75 s); 5 terms 0.96 s against
# 0.44 s; 60 terms 5.9 s against 4.1 s.
BLOCK_ROWS = 16_384

# Aggregates per query of the "sql" source, by dialect. Spark compiles a query stage into Java methods
# the JVM optimizes only while they stay small; the X'WX of 60 terms (1830 sums) in one query ran
# interpreted: 88 s on 700,000 rows, against 35 s in parts of 500 sums (250: 49 s; 100: 95 s, each
# part reading the rows again; measured on this machine).
AGGREGATES_PER_QUERY = {"spark": 500}
GROUP = "_group"  # the column of each row's group in grouped batches (`engine_batches`)


@dataclass(frozen=True)
class Scaling:
    """Centers and scales of the terms, in term order: the working coordinates of IRLS."""

    centers: np.ndarray
    scales: np.ndarray

    @classmethod
    def of(cls, terms: Sequence[np.ndarray]) -> Scaling:
        """Mean and population sd of each term column; scale 1 where the column has no spread."""
        centers = np.array([float(values.mean()) if len(values) else 0.0 for values in terms])
        scales = np.array([float(values.std()) if len(values) else 0.0 for values in terms])
        spread = np.isfinite(scales) & (scales > 0)
        return cls(np.where(np.isfinite(centers), centers, 0.0), np.where(spread, scales, 1.0))

    def to_original(self) -> np.ndarray:
        """Matrix T with beta_original = T @ beta_standardized (intercept first)."""
        size = len(self.centers) + 1
        transform = np.zeros((size, size))
        transform[0, 0] = 1.0
        transform[0, 1:] = -self.centers / self.scales
        transform[np.arange(1, size), np.arange(1, size)] = 1.0 / self.scales
        return transform


@dataclass(frozen=True)
class Request:
    """A linear predictor to evaluate: term indices (into the model's terms) and coefficients."""

    terms: tuple[int, ...]
    beta: np.ndarray  # intercept first


@dataclass(frozen=True)
class Statistics:
    """Sums over the training rows at one coefficient vector (q = 1 + number of terms)."""

    deviance: float
    boundary_rows: int  # fitted value within 1e-10 of 0 or 1 (binomial), below 1e-10 (poisson)
    score: np.ndarray  # sum of w (y - mu) x, shape (q,)
    xtwx: np.ndarray  # X'WX, shape (q, q)
    pearson: float = math.nan  # Pearson chi2: sum of w (y - mu)^2 / V(mu)


class StatisticsSource(Protocol):
    name: str
    passes: int  # full reads of the training rows so far

    def evaluate(self, requests: Sequence[Request]) -> list[Statistics]: ...

    def evaluate_with_profile(self, requests: Sequence[Request], names: Sequence[str]) -> tuple[list[Statistics], TrainingProfile, float]:
        """The first pass: statistics, the training profile and the log-likelihood constant (0 if none)."""
        ...


class SqlAggregateSource:
    name = "sql"

    def __init__(self, engine: Engine, layout: DesignLayout, family: Family, scaling: Scaling):
        self.engine, self.layout, self.family = engine, layout, family
        self.centers = dict(zip(layout.terms, scaling.centers.tolist(), strict=True))
        self.scales = dict(zip(layout.terms, scaling.scales.tolist(), strict=True))
        self.passes = 0

    def evaluate(self, requests: Sequence[Request]) -> list[Statistics]:
        query = statistics_query(self.layout, self.family.name, self.centers, self.scales, self._models(requests),
                                 eta_limit=self.family.eta_limit, boundary_eta=BOUNDARY_ETA, power=self.family.power)
        return self._read(self._row(query), requests)

    def evaluate_with_profile(self, requests: Sequence[Request], names: Sequence[str]) -> tuple[list[Statistics], TrainingProfile, float]:
        """Statistics and the training profile (shifted by the centers) from one query, as a batch source
        gathers them in one pass; for poisson and gamma also the log-likelihood constant, from the
        weight per distinct target value (one more read: its function has no portable SQL)."""
        query = first_pass_query(self.layout, self.centers, self.family.name, self.centers, self.scales, self._models(requests),
                                 eta_limit=self.family.eta_limit, boundary_eta=BOUNDARY_ETA, power=self.family.power)
        row = self._row(query)
        width = profile_width(self.layout)
        profile = read_profile(row[:width], self.layout, self.centers)
        constant = getattr(self.family, "likelihood_constant", None)
        if constant is None:
            return self._read(row[width:], requests), profile, 0.0
        counts = sorted((float(value), float(weight)) for value, weight in self.engine.fetch(target_counts_query(self.layout)))
        self.passes += 1
        values = np.array([value for value, _ in counts])
        weights = np.array([weight for _, weight in counts])
        return self._read(row[width:], requests), profile, float(weights @ constant(values))

    def _row(self, query: exp.Select) -> tuple:
        """The one row of the aggregate `query`, read in parts of at most AGGREGATES_PER_QUERY aggregates
        where the dialect has a limit; each part is a pass over the rows."""
        size = AGGREGATES_PER_QUERY.get(self.engine.dialect, len(query.expressions))
        row: tuple = ()
        for start in range(0, len(query.expressions), size):
            part = query.copy()
            part.set("expressions", part.expressions[start : start + size])
            (values,) = self.engine.fetch(part)
            row += tuple(values)
            self.passes += 1
        return row

    def _models(self, requests: Sequence[Request]) -> list[ModelRequest]:
        return [ModelRequest(tuple(self.layout.terms[i] for i in request.terms), tuple(request.beta.tolist())) for request in requests]

    def _read(self, row: Sequence, requests: Sequence[Request]) -> list[Statistics]:
        """One `Statistics` per request from the row of `statistics_query`."""
        pearson = [np.nan if value is None else float(value) for value in row[len(row) - len(requests):]]
        unpacked = unpack_statistics(row[: len(row) - len(requests)], [len(request.terms) + 1 for request in requests])
        return [replace(statistics, pearson=chi2) for statistics, chi2 in zip(unpacked, pearson, strict=True)]


def unpack_statistics(row: Sequence, sizes: list[int]) -> list[Statistics]:
    """Split the row of `statistics_query` into one `Statistics` per model."""
    values = [np.nan if value is None else float(value) for value in row]
    out, position = [], 0
    for size in sizes:
        deviance, boundary = values[position], values[position + 1]
        position += 2
        score = np.array(values[position : position + size])
        position += size
        xtwx = np.empty((size, size))
        for i, j in upper_pairs(size):
            xtwx[i, j] = xtwx[j, i] = values[position]
            position += 1
        out.append(Statistics(deviance, 0 if np.isnan(boundary) else int(boundary), score, xtwx))
    return out


@dataclass(frozen=True)
class Batch:
    """Raw design columns of some training rows."""

    y: np.ndarray
    offset: np.ndarray | None
    weight: np.ndarray | None
    terms: list[np.ndarray]  # one column per term, in term order
    group: np.ndarray | None = None  # each row's group (its cross-validation fold), when read with one


class BatchSource:
    """Accumulates the statistics over batches with numpy; memory is one batch.

    `evaluate_with_profile` also gathers the training profile in the same pass, so a batch source
    needs no separate profile query.
    """

    def __init__(self, name: str, batches: Callable[[], Iterable[Batch]], family: Family, scaling: Scaling):
        self.name, self.batches, self.family, self.scaling = name, batches, family, scaling
        self.inverse_scales = 1.0 / scaling.scales
        self.passes = 0
        self._buffers: dict[str, np.ndarray] = {}
        self._saturated: float | None = None  # the sum of w times the family's saturated deviance, once known

    def _buffer(self, role: str, rows: int, columns: int) -> np.ndarray:
        """A Fortran-ordered rows x columns scratch matrix over memory reused from batch to batch
        (batch sizes vary): a fresh allocation this large costs page faults worth several times the
        arithmetic done in it."""
        size = rows * columns
        if role not in self._buffers or len(self._buffers[role]) < size:
            self._buffers[role] = np.empty(size)
        return self._buffers[role][:size].reshape((rows, columns), order="F")

    def evaluate(self, requests: Sequence[Request]) -> list[Statistics]:
        return self._pass(requests, None)

    def evaluate_with_profile(self, requests: Sequence[Request], names: Sequence[str]) -> tuple[list[Statistics], TrainingProfile, float]:
        """Statistics, the training profile (shifted by the scaling's centers) and, for poisson and gamma,
        the log-likelihood constant: the sum of w times the family's `likelihood_constant` of y."""
        profile = _ProfileTotals(self.scaling.centers, getattr(self.family, "likelihood_constant", None))
        statistics = self._pass(requests, profile)
        return statistics, profile.profile(names), profile.constant

    def _pass(self, requests: Sequence[Request], profile: _ProfileTotals | None) -> list[Statistics]:
        totals = [Totals(len(request.terms) + 1) for request in requests]
        saturated = 0.0 if self._saturated is None else None  # summed in the first pass only: a sum of y alone
        with one_blas_thread():
            for batch in self.batches():
                for block in row_blocks(batch, BLOCK_ROWS):
                    standardized = self._standardize(block.terms, len(block.y))
                    if profile is not None:
                        profile.add(block, standardized, self.scaling.scales)
                    if saturated is not None:
                        saturated += weighted_sum(self.family.saturated_deviance(block.y), block.weight)
                    for request, total in zip(requests, totals, strict=True):
                        x = term_columns(standardized, request.terms)
                        scratch = None if x is None else self._buffer("rooted", len(x), 1 + x.shape[1])
                        total.add(self.family, block, x, request.beta, scratch)
        self.passes += 1
        if saturated is not None:
            self._saturated = saturated
        return [total.statistics(self._saturated) for total in totals]

    def _standardize(self, columns: list[np.ndarray], rows: int) -> np.ndarray:
        """(x - center) / scale per term, as one Fortran-ordered matrix (columns contiguous for BLAS)."""
        matrix = self._buffer("standardized", rows, len(columns))
        for j, values in enumerate(columns):
            np.subtract(values, self.scaling.centers[j], out=matrix[:, j])
            matrix[:, j] *= self.inverse_scales[j]
        return matrix


@cache
def _blas_controller() -> ThreadpoolController:
    return ThreadpoolController()  # finds the BLAS libraries numpy and scipy loaded (once: it scans the process)


def one_blas_thread() -> contextlib.AbstractContextManager:
    """BLAS on one thread while a pass runs. Its products over a batch (n x p with p small) are bound by
    memory, not arithmetic, so a second BLAS thread gains little; it does take the core the engine
    reads the next batch on, and on a busy machine its threads wait on each other: in
    benchmarks/bench_fit.py a 2M-row stream fit took 6.9 s with two BLAS threads and 3.8 s with one."""
    return _blas_controller().limit(limits=1, user_api="blas")


def term_columns(matrix: np.ndarray, terms: tuple[int, ...]) -> np.ndarray | None:
    if not terms:
        return None
    if terms == tuple(range(matrix.shape[1])):
        return matrix
    return np.asfortranarray(matrix[:, list(terms)])


class Totals:
    """Running sums of one model's statistics."""

    def __init__(self, size: int):
        self.deviance, self.boundary, self.pearson = 0.0, 0, 0.0
        self.score = np.zeros(size)
        self.xtwx = np.zeros((size, size))

    def add(self, family: Family, batch: Batch, x: np.ndarray | None, beta: np.ndarray, scratch: np.ndarray | None) -> None:
        """Add one batch; `scratch` (rows x (1 + columns of x)) receives the rows of [1, x] times sqrt(weight).
        Without terms or offset the linear predictor is one number for every row, and so are mu and the
        working weight."""
        rows = len(batch.y)
        if x is None:
            eta = np.float64(beta[0]) if batch.offset is None else batch.offset + beta[0]
        else:
            eta = x @ beta[1:]
            eta += beta[0]
            if batch.offset is not None:
                eta += batch.offset
        eta = family.clamp(eta)
        mu = family.mean(eta)
        weight = family.working_weight(mu)
        residual = family.score_residual(batch.y, mu)
        if batch.weight is not None:
            weight, residual = weight * batch.weight, residual * batch.weight
        self.deviance += weighted_sum(family.fitted_deviance(batch.y, eta, mu), batch.weight)
        self.pearson += weighted_sum(family.pearson(batch.y, mu), batch.weight)
        self.boundary += int(np.broadcast_to(family.boundary(eta), rows).sum())
        self.score[0] += residual.sum()
        if x is None:
            self.xtwx[0, 0] += float(weight.sum()) if np.ndim(weight) else float(weight) * rows
        else:
            self.score[1:] += residual @ x
            root = np.sqrt(weight, out=scratch[:, 0])  # the intercept's column of ones, rooted
            np.multiply(x, root[:, None], out=scratch[:, 1:])
            self.xtwx += dsyrk(1.0, scratch, trans=1, lower=0)  # upper triangle of [1, x]' W [1, x] in one product

    def statistics(self, saturated: float) -> Statistics:
        """The sums, the deviance with the saturated part common to every model (see `Family.saturated_deviance`)."""
        upper = np.triu(self.xtwx)
        return Statistics(self.deviance + saturated, self.boundary, self.score.copy(), upper + np.triu(upper, 1).T, self.pearson)


def weighted_sum(values: np.ndarray | None, weight: np.ndarray | None) -> float:
    """Sum of per-row values (None: all 0) times the prior weights (None: all 1)."""
    if values is None:
        return 0.0
    return float(values.sum() if weight is None else weight @ values)


class _ProfileTotals:
    """Running sums of the training profile, the same sums `profile_query` takes in SQL."""

    def __init__(self, shifts: np.ndarray, likelihood_constant: Callable[[np.ndarray], np.ndarray] | None):
        self.shifts, self.likelihood_constant = shifts, likelihood_constant
        size = len(shifts)
        self.rows, self.not_binary, self.negative, self.not_integer, self.nonpositive_weights = 0, 0, 0, 0, 0
        self.weight_sum = self.weighted_target_sum = self.target_sum = 0.0
        self.weighted_offset_sum = self.log_weight_sum = self.constant = 0.0
        self.target_min, self.target_max = math.inf, -math.inf
        self.shifted, self.squares = np.zeros(size), np.zeros(size)
        self.low, self.high = np.full(size, math.inf), np.full(size, -math.inf)

    def add(self, batch: Batch, standardized: np.ndarray, scales: np.ndarray) -> None:
        """Add one batch; its terms are read from `standardized` = (x - shift) / scales."""
        y, weight = batch.y, batch.weight
        self.rows += len(y)
        self.weight_sum += len(y) if weight is None else float(weight.sum())
        self.weighted_target_sum += float(y.sum() if weight is None else weight @ y)
        self.target_sum += float(y.sum())
        self.target_min, self.target_max = min(self.target_min, float(y.min())), max(self.target_max, float(y.max()))
        if batch.offset is not None:
            self.weighted_offset_sum += float(batch.offset.sum() if weight is None else weight @ batch.offset)
        if weight is not None:
            self.log_weight_sum += float(np.log(weight[weight > 0]).sum())
            self.nonpositive_weights += int((weight <= 0).sum())
        self.not_binary += int(((y != 0) & (y != 1)).sum())
        self.negative += int((y < 0).sum())
        self.not_integer += int((y != np.floor(y)).sum())
        if self.likelihood_constant is not None:
            constant = self.likelihood_constant(y)
            self.constant += float(constant.sum() if weight is None else weight @ constant)
        if standardized.shape[1]:  # whole-matrix reductions where numpy has one; a dot per column beats einsum 2x
            self.shifted += (np.ones(len(y)) @ standardized) * scales
            self.squares += np.array([values @ values for values in standardized.T]) * scales**2
            self.low = np.minimum(self.low, standardized.min(axis=0) * scales + self.shifts)
            self.high = np.maximum(self.high, standardized.max(axis=0) * scales + self.shifts)

    def profile(self, names: Sequence[str]) -> TrainingProfile:
        rows = self.rows
        return TrainingProfile(
            rows=rows,
            weight_sum=self.weight_sum,
            weighted_target_sum=self.weighted_target_sum,
            target_sum=self.target_sum,
            target_min=self.target_min if rows else None,
            target_max=self.target_max if rows else None,
            weighted_offset_sum=self.weighted_offset_sum,
            log_weight_sum=self.log_weight_sum,
            not_binary=self.not_binary,
            negative=self.negative,
            not_integer=self.not_integer,
            nonpositive_weights=self.nonpositive_weights,
            terms=tuple(
                term_profile(name, rows, float(self.shifts[j]), float(self.shifted[j]), float(self.squares[j]), self.low[j], self.high[j])
                for j, name in enumerate(names)
            ),
        )


def in_memory_batches(data: Batch, batch_rows: int) -> Callable[[], Iterator[Batch]]:
    """Batches of `batch_rows` rows over data already in memory (temporaries stay one batch)."""
    return partial(row_blocks, data, batch_rows)


def row_blocks(data: Batch, rows: int) -> Iterator[Batch]:
    """Consecutive slices of `rows` rows of `data` (views: nothing is copied); none when it has no rows."""
    for start in range(0, len(data.y), rows):
        part = slice(start, start + rows)
        yield Batch(data.y[part], cut_rows(data.offset, part), cut_rows(data.weight, part), [values[part] for values in data.terms],
                    cut_rows(data.group, part))


def cut_rows(values: np.ndarray | None, rows: slice | np.ndarray) -> np.ndarray | None:
    return None if values is None else values[rows]


class LocalCopy:
    """Batches read from the engine once, then from a local temporary file: a callable like `engine_batches`.

    On PostgreSQL evaluating the p(p+1)/2 products of an aggregate pass costs many times a plain
    scan, and streaming the rows out costs about the same each time; so the first call streams them and
    writes each batch's columns (float64) to an unnamed temporary file, and later calls read that file
    back batch by batch. Memory stays one batch; the disk holds 8 bytes per row and design column (1.3 GB
    at 10M rows x 16 columns) until `close`. `reads` counts the reads of the engine.
    """

    def __init__(self, batches: Callable[[], Iterable[Batch]]):
        self.engine_batches = batches
        self.reads = 0
        self._file = None
        self._shapes: list[tuple[int, bool, bool, int, bool]] = []  # rows, has offset, has weight, terms, has group

    def __call__(self) -> Iterator[Batch]:
        return self._copy() if self._file is None else self._replay()

    def _copy(self) -> Iterator[Batch]:
        """Stream from the engine, keeping each batch; a copy left unfinished is thrown away."""
        file = tempfile.TemporaryFile(prefix="featpipe-design-")
        shapes: list[tuple[int, bool, bool, int, bool]] = []
        self.reads += 1
        try:
            for batch in self.engine_batches():
                columns = [batch.y, *(c for c in (batch.offset, batch.weight) if c is not None), *batch.terms,
                           *(() if batch.group is None else (batch.group,))]
                for values in columns:
                    np.ascontiguousarray(values, dtype=np.float64).tofile(file)
                shapes.append((len(batch.y), batch.offset is not None, batch.weight is not None, len(batch.terms),
                               batch.group is not None))
                yield batch
        except BaseException:
            file.close()
            raise
        self._file, self._shapes = file, shapes

    def _replay(self) -> Iterator[Batch]:
        self._file.seek(0)
        for rows, has_offset, has_weight, terms, has_group in self._shapes:
            width = 1 + has_offset + has_weight + terms + has_group
            columns = list(np.fromfile(self._file, dtype=np.float64, count=rows * width).reshape(width, rows))
            y = columns.pop(0)
            offset = columns.pop(0) if has_offset else None
            weight = columns.pop(0) if has_weight else None
            group = columns.pop() if has_group else None
            yield Batch(y, offset, weight, columns, group)

    def close(self) -> None:
        if self._file is not None:
            self._file.close()
            self._file = None


def engine_batches(engine: Engine, layout: DesignLayout, batch_rows: int,
                   group: exp.Expression | None = None) -> Callable[[], Iterator[Batch]]:
    """Batches streamed from the engine: the design columns of the training rows, with each row's
    `group` (an expression over the design table, e.g. its cross-validation fold) when one is given.

    On DuckDB the next batch is read by a helper thread while numpy works on the current one (both
    release the GIL); other drivers may be tied to the thread that opened them, so they read inline.
    """
    query = design_columns_query(layout)
    if group is not None:
        query = query.select(alias(group.copy(), GROUP))

    def batches() -> Iterator[Batch]:
        converted = (batch_from_arrow(record_batch, layout, grouped=group is not None)
                     for record_batch in engine.fetch_batches(query, batch_rows))
        return _read_ahead(converted) if engine.name == "duckdb" else converted

    return batches


def _read_ahead(items: Iterator[Batch]) -> Iterator[Batch]:
    """Yield from `items`, fetching the next item in a helper thread meanwhile (one item ahead)."""
    with ThreadPoolExecutor(max_workers=1) as pool:
        pending = pool.submit(next, items, None)
        while (item := pending.result()) is not None:
            pending = pool.submit(next, items, None)
            yield item


def batch_from_arrow(result: pa.RecordBatch | pa.Table, layout: DesignLayout, grouped: bool = False) -> Batch:
    """A `Batch` from the columns of `design_columns_query`: target, [offset], [weight], terms, and with
    `grouped` the group last."""
    columns = [numpy_values(column) for column in result.columns]
    group = columns.pop() if grouped else None
    position = 1
    offset = weight = None
    if layout.offset:
        offset, position = columns[position], position + 1
    if layout.weight:
        weight, position = columns[position], position + 1
    return Batch(columns[0], offset, weight, columns[position:], group)


def numpy_values(values: pa.Array | pa.ChunkedArray) -> np.ndarray:
    """An Arrow column as a numpy array: numbers without NULLs are read from each chunk's data buffer (one
    chunk: no copy, read-only), anything else as pyarrow converts it. pyarrow's `to_numpy` imports pandas,
    which nothing else in a fit needs: 0.3 s of every `featpipe fit`."""
    chunks = values.chunks if isinstance(values, pa.ChunkedArray) else [values]
    numeric = pa.types.is_floating(values.type) or pa.types.is_integer(values.type)
    if not numeric or values.null_count or len(chunks) == 0:
        return values.to_numpy(zero_copy_only=False)
    dtype = values.type.to_pandas_dtype()  # a numpy type; pandas is not imported for it
    parts = [np.frombuffer(chunk.buffers()[1], dtype=dtype, count=len(chunk), offset=chunk.offset * values.type.byte_width)
             for chunk in chunks]
    return parts[0] if len(parts) == 1 else np.concatenate(parts)
