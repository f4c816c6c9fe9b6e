"""Scale-out evidence: indb's fit on Spark SQL next to Spark's own plain scan, in one run.

Run from the repository root::

    .venv/bin/python benchmarks/bench_spark.py                      # 10^6 rows, local[2]
    .venv/bin/python benchmarks/bench_spark.py --rows 1e6,1e7 --partitions 16
    .venv/bin/python benchmarks/bench_spark.py --master sc://127.0.0.1:15002 --out /tmp/s.md

For each size the invented table of ``bench_data`` (cached single file, as for
``bench_fit.py``) is rewritten once as a partitioned Parquet dataset under
``benchmarks/data/`` (git-ignored): ``--partitions N`` files of at most rows/N rows, or with
``--partition-by c6`` Hive-style folders ``c6=k1/ ...``. Then, in one Spark session, it
measures

(a) the floor: Spark's own plain aggregate scan of the columns a model reads (a SUM per
    column, string length for the categorical ones), one warm-up then best of 3;
(b) indb's fit on Spark (``indb.fit(..., db=<SparkEngine>)``): total time, iterations and
    seconds per IRLS scan from the fit's iteration log, and every query the fit sent (kind,
    engine seconds, size of the result that came back to the driver);
(c) seconds per IRLS scan divided by the floor, rows per second, the bytes back per IRLS
    scan against the Parquet input size;
(d) the same fit with the default in-memory DuckDB engine on the same Parquet files, its
    own floor, and the agreement of the two coefficient vectors.

It prints one table and writes a Markdown report (``--out``, default
``benchmarks/SPARK.md``) plus the raw measurements as JSON next to the data
(``spark_last_run.json``; ``--report-only JSON`` renders the report again from it). Anything
after the line ``<!-- hand-written notes below ... -->`` in an existing report is kept.
``--models-above-1e6`` narrows the models for the larger sizes, to keep a 10^7 run short.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import logging
import math
import os
import platform
import resource
import shutil
import sys
import time
from dataclasses import dataclass, field
from typing import Any

import bench_data
import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
from bench_fit import floor_items, floor_sql, parse_rows
from bench_report import cpu_and_memory, indb_commit

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, ROOT)  # run from a checkout: the indb package next to benchmarks/

import indb  # noqa: E402
from indb.engines.duckdb import DuckDBEngine  # noqa: E402
from indb.engines.spark import SparkEngine  # noqa: E402

MIB = 1024**2
# a numeric-only logistic model (not among bench_data's four), to pair with poisson_num
LOGISTIC_NUM = bench_data.Model(
    "logistic_num",
    "logistic, 10 num only (p=11)",
    "flag",
    "binomial",
    bench_data.NUMERIC,
    None,
)
MODELS = {m.key: m for m in (*bench_data.MODELS, LOGISTIC_NUM)}
DEFAULT_MODELS = "poisson_num,poisson,logistic_num,logistic"


# -- data ------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Dataset:
    """A partitioned Parquet copy of the benchmark table and how each engine names it."""

    folder: str
    rows: int
    files: int
    bytes: int
    partition_by: str | None

    @property
    def spark_source(self) -> str:
        return self.folder  # Spark reads a folder (and discovers Hive partitions) itself

    @property
    def duckdb_source(self) -> str:
        # DuckDB needs a glob; with c6=k1/ folders it recognises the Hive layout
        return os.path.join(self.folder, "**" if self.partition_by else "", "*.parquet")

    def parquet_files(self) -> list[str]:
        out = []
        for base, _, names in os.walk(self.folder):
            out += [os.path.join(base, n) for n in names if n.endswith(".parquet")]
        return sorted(out)


def ensure_dataset(data_dir: str, rows: int, partitions: int, partition_by: str | None) -> Dataset:
    """Write (once) the table of ``rows`` rows as about ``partitions`` Parquet files."""
    single, _ = bench_data.ensure_data(data_dir, rows)
    tag = f"_by_{partition_by}" if partition_by else ""
    folder = os.path.join(data_dir, f"spark_{rows}_{bench_data.SEED}_{partitions}{tag}")
    if not os.path.isdir(folder):
        partial = folder + ".partial"
        shutil.rmtree(partial, ignore_errors=True)
        per_file = math.ceil(rows / partitions)
        layout = None
        if partition_by:
            field_ = bench_data.SCHEMA.field(partition_by)
            layout = ds.partitioning(pa.schema([field_]), flavor="hive")
        ds.write_dataset(
            ds.dataset(single, format="parquet"),
            partial,
            format="parquet",
            partitioning=layout,
            basename_template="part-{i}.parquet",
            max_rows_per_file=per_file,
            max_rows_per_group=min(per_file, bench_data.ROW_GROUP_ROWS),
            min_rows_per_group=min(per_file, bench_data.ROW_GROUP_ROWS),
            file_options=ds.ParquetFileFormat().make_write_options(compression="snappy"),
            use_threads=False,  # the same files on every run
        )
        os.replace(partial, folder)
    files = Dataset(folder, rows, 0, 0, partition_by).parquet_files()
    return Dataset(folder, rows, len(files), sum(os.path.getsize(f) for f in files), partition_by)


def used_column_bytes(dataset: Dataset, columns: tuple[str, ...]) -> int:
    """Compressed bytes of the model's columns in the Parquet files (what a scan must read;
    a Hive partition column lives in the folder names and costs nothing)."""
    total = 0
    for path in dataset.parquet_files():
        meta = pq.ParquetFile(path).metadata
        for g in range(meta.num_row_groups):
            group = meta.row_group(g)
            for j in range(group.num_columns):
                if group.column(j).path_in_schema in columns:
                    total += group.column(j).total_compressed_size
    return total


# -- engines ---------------------------------------------------------------------------------


@dataclass
class Call:
    kind: str
    seconds: float
    cpu_seconds: float
    result_rows: int
    result_values: int
    result_bytes: int


@dataclass
class Recorder:
    calls: list[Call] = field(default_factory=list)
    last_irls_sql: str = ""

    def note(
        self, sql: str, seconds: float, cpu: float, cols: dict[str, np.ndarray] | None
    ) -> None:
        if query_kind(sql) == "irls":
            self.last_irls_sql = sql
        rows = values = size = 0
        if cols:
            rows = len(next(iter(cols.values())))
            values = rows * len(cols)
            for arr in cols.values():
                if arr.dtype == object:
                    size += sum(len(str(v).encode()) for v in arr if v is not None)
                else:
                    size += arr.nbytes
        self.calls.append(Call(query_kind(sql), seconds, cpu, rows, values, size))


KINDS = ("profile", "sample", "levels", "irls", "loglik", "edge", "other")


def query_kind(sql: str) -> str:
    """Which of indb's queries this is, from the aliases its plan builders use."""
    up = sql.upper().replace('"', "").replace("`", "")  # aliases are quoted per dialect
    if "S_0_0" in up or " AS R_0" in up:
        return "irls"  # gram_query or log_scan_query: X'WX, X'Wz and deviance sums
    if "N_KEPT" in up:
        return "profile"  # profile_query: counts, NULL exclusions, domain checks, moments
    if "GROUPING" in up:
        return "levels"  # levels_query: level counts by GROUPING SETS
    if " LIMIT " in up:
        return "sample"  # sample_distinct_query: distinct design rows among the first rows
    if " AS LL" in up:
        return "loglik"  # loglik_query: log-likelihood at the fitted means
    if " AS EDGE" in up:
        return "edge"  # binomial: rows with fitted probabilities at or near 0 or 1
    return "other"


class RecordingDuckDB(DuckDBEngine):
    """The stock in-memory DuckDB adapter, recording like :class:`RecordingSpark`."""

    def __init__(self, recorder: Recorder) -> None:
        super().__init__(None)
        self.recorder = recorder

    def fetch_columns(self, sql: str) -> dict[str, np.ndarray]:
        c0 = process_cpu()
        out = super().fetch_columns(sql)
        self.recorder.note(sql, self.last_seconds, process_cpu() - c0, out)
        return out


class RecordingSpark(SparkEngine):
    """The stock Spark adapter, noting each query's kind, engine time and result size."""

    def __init__(self, session: Any, recorder: Recorder, cpu: JvmCpu) -> None:
        super().__init__(session)
        self.recorder = recorder
        self.cpu = cpu

    def fetch_columns(self, sql: str) -> dict[str, np.ndarray]:
        c0 = self.cpu()
        out = super().fetch_columns(sql)
        self.recorder.note(sql, self.last_seconds, self.cpu() - c0, out)
        return out

    def execute(self, sql: str) -> list[tuple[Any, ...]]:
        c0 = self.cpu()
        out = super().execute(sql)
        self.recorder.note(sql, self.last_seconds, self.cpu() - c0, None)
        return out


class JvmCpu:
    """User + system CPU seconds of the in-process Spark driver JVM (all its threads: in
    ``local[N]`` the executors are threads of it); NaN for a remote cluster.

    Wall seconds on a shared machine depend on what else runs; CPU seconds much less so.
    """

    def __init__(self, engine: SparkEngine) -> None:
        self.stat = None
        jvm = getattr(engine.session, "_jvm", None)
        if jvm is not None:
            try:
                pid = int(jvm.java.lang.ProcessHandle.current().pid())
                self.stat = f"/proc/{pid}/stat"
            except Exception:  # Spark Connect or no py4j gateway: no local JVM to read
                self.stat = None
        self.tick = os.sysconf("SC_CLK_TCK")

    def __call__(self) -> float:
        if self.stat is None:
            return math.nan
        with open(self.stat) as fh:
            fields = fh.read().rsplit(")", 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / self.tick  # utime, stime


def start_spark(master: str, conf: dict[str, str]) -> SparkEngine:
    for name in ("SQLQueryContextLogger", "DataFrameQueryContextLogger", "py4j"):
        logging.getLogger(name).setLevel(logging.CRITICAL)
    if master.startswith("sc://"):
        engine = SparkEngine(remote=master, conf=conf)
    else:
        engine = SparkEngine(master=master, conf=conf)
        engine.session.sparkContext.setLogLevel("ERROR")
    return engine


def spark_conf(args: argparse.Namespace) -> dict[str, str]:
    conf = {"spark.sql.shuffle.partitions": str(args.shuffle_partitions)}
    if not args.master.startswith("sc://"):
        # the driver JVM starts inside this process, so its settings are ours to give
        conf.update(
            {
                "spark.driver.memory": args.driver_memory,
                "spark.driver.host": "127.0.0.1",
                "spark.driver.bindAddress": "127.0.0.1",
            }
        )
    return conf


def ensure_java_home() -> str:
    """pyspark needs a JVM; Debian's ``java`` on PATH leaves JAVA_HOME unset."""
    home = os.environ.get("JAVA_HOME")
    if not home:
        java = shutil.which("java")
        if java is None:
            raise SystemExit("no Java runtime: install one (bash .ci/services.sh install)")
        home = os.path.dirname(os.path.dirname(os.path.realpath(java)))
        os.environ["JAVA_HOME"] = home
    return home


# -- measurements ----------------------------------------------------------------------------


def spark_ident(name: str) -> str:
    return "`" + name.replace("`", "``") + "`"


def spark_floor_sql(source: str, model: bench_data.Model) -> str:
    """The floor scan in Spark SQL: ``bench_fit.floor_items`` over the Parquet folder."""
    items = floor_items(model, quote=spark_ident, strlen="length")
    return f"SELECT {items} FROM parquet.{spark_ident(source)}"


def process_cpu() -> float:
    """User + system CPU seconds of this process (DuckDB's threads run inside it)."""
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


def best_of(run: Any, repeats: int, cpu: Any) -> dict[str, Any]:
    """One warm-up (JIT, file listing, page cache), then ``repeats`` timed runs: the best
    wall time, every wall time, and the CPU seconds of the best run."""
    run()
    times, cpus = [], []
    for _ in range(repeats):
        c0 = cpu()
        t0 = time.perf_counter()
        run()
        times.append(time.perf_counter() - t0)
        cpus.append(cpu() - c0)
    k = int(np.argmin(times))
    return {"best": times[k], "all": times, "cpu": cpus[k]}


def measure_fit(
    model: bench_data.Model, source: str, db: Any, recorder: Recorder | None
) -> dict[str, Any]:
    load = os.getloadavg()[0]
    t0 = time.perf_counter()
    try:
        res = indb.fit(
            source,
            model.response,
            model.family,
            db=db,
            offset=model.offset,
            predictors=list(model.predictors),
        )
    except Exception as err:  # recorded as a result row; the run goes on
        return {"status": f"error: {type(err).__name__}: {str(err)[:200]}", "load1": load}
    wall = time.perf_counter() - t0
    fit_recs = [r for r in res.iteration_log if r.phase == "fit"]
    out: dict[str, Any] = {
        "status": "ok" if res.converged else "not converged",
        "seconds": wall,
        "fit_seconds": res.seconds,
        "iterations": res.iterations,
        "scan_seconds": [r.seconds for r in fit_recs],
        "s_per_iter": float(np.mean([r.seconds for r in fit_recs])) if fit_recs else math.nan,
        "p": len(res.terms),
        "terms": res.terms,
        "params": [float(v) for v in res.estimates],
        "std_errors": [float(v) for v in res.std_errors],
        "deviance": res.deviance,
        "n_used": res.n_used,
        "path": res.path,
        "load1": load,
    }
    if recorder is not None:
        calls = recorder.calls
        irls = [c for c in calls if c.kind == "irls"]
        out["queries"] = {k: sum(c.kind == k for c in calls) for k in KINDS}
        out["query_seconds"] = {k: sum(c.seconds for c in calls if c.kind == k) for k in KINDS}
        out["irls_result_rows"] = max((c.result_rows for c in irls), default=0)
        out["irls_result_values"] = max((c.result_values for c in irls), default=0)
        out["irls_result_bytes"] = max((c.result_bytes for c in irls), default=0)
        out["irls_engine_seconds"] = [c.seconds for c in irls]
        out["irls_cpu_seconds"] = [c.cpu_seconds for c in irls]
        out["cpu_per_iter"] = float(np.mean(out["irls_cpu_seconds"])) if irls else math.nan
    return out


def agreement(a: dict[str, Any], b: dict[str, Any]) -> dict[str, float]:
    """Spark fit ``a`` against DuckDB fit ``b``, term by term (matched by name)."""
    pb = dict(zip(b["terms"], b["params"], strict=True))
    sb = dict(zip(b["terms"], b["std_errors"], strict=True))
    rel, in_se = 0.0, 0.0
    for term, value in zip(a["terms"], a["params"], strict=True):
        ref = pb[term]
        diff = abs(value - ref)
        rel = max(rel, diff / max(abs(ref), 1e-300))
        in_se = max(in_se, diff / sb[term])
    dev = abs(a["deviance"] - b["deviance"]) / abs(b["deviance"])
    same_terms = sorted(a["terms"]) == sorted(b["terms"])
    return {"max_rel": rel, "max_in_se": in_se, "deviance_rel": dev, "same_terms": same_terms}


def dense_stats_bytes(p: int) -> int:
    """X'WX (p x p), X'Wz (p) and a few scalars (deviance, Pearson, n, ...) as doubles."""
    return 8 * (p * p + p + 5)


# -- machine ---------------------------------------------------------------------------------


def commit_label() -> str:
    commit, changed = indb_commit()
    return commit + (" (indb/ modified)" if changed else "")


def machine(engine: SparkEngine) -> dict[str, Any]:
    cpu, mem = cpu_and_memory()
    java = engine.session.sql(
        "SELECT reflect('java.lang.System', 'getProperty', 'java.version') AS v"
    ).collect()[0][0]
    import pyspark

    return {
        "cores": os.cpu_count(),
        "cpu": cpu,
        "ram_gib": mem / 1024**3,
        "os": f"{platform.system()} {platform.release()}",
        "python": platform.python_version(),
        "spark": engine.session.version,
        "pyspark": pyspark.__version__,
        "java": java,
        "duckdb": duckdb.__version__,
        "indb_commit": commit_label(),
    }


def log(msg: str) -> None:
    stamp = dt.datetime.now().strftime("%H:%M:%S")
    print(f"[{stamp}] {msg}", file=sys.stderr, flush=True)


# -- the run ---------------------------------------------------------------------------------


def run(args: argparse.Namespace) -> dict[str, Any]:
    started = dt.datetime.now()
    load_start = os.getloadavg()
    java_home = ensure_java_home()
    log(f"starting Spark ({args.master})")
    t0 = time.perf_counter()
    engine = start_spark(args.master, spark_conf(args))
    spark_start = time.perf_counter() - t0
    warmup = math.nan
    if args.warmup:
        # one untimed fit on a small slice, so no measured fit pays for the JVM compiling
        # Spark's planner and code generator (a long-lived cluster session has done so)
        log("warm-up fit on 20,000 rows")
        data = ensure_dataset(args.data_dir, args.rows[0], args.partitions, args.partition_by)
        slice_sql = f"SELECT * FROM parquet.{spark_ident(data.spark_source)} LIMIT 20000"
        model = MODELS["poisson"]
        t0 = time.perf_counter()
        measure_fit(model, slice_sql, engine, None)
        warmup = time.perf_counter() - t0
    info = machine(engine)
    jvm_cpu = JvmCpu(engine)
    info["java_home"] = java_home
    sizes: list[dict[str, Any]] = []
    try:
        for rows in args.rows:
            log(f"{rows:,} rows: data")
            data = ensure_dataset(args.data_dir, rows, args.partitions, args.partition_by)
            size: dict[str, Any] = {
                "rows": rows,
                "files": data.files,
                "input_bytes": data.bytes,
                "partition_by": data.partition_by,
                "folder": os.path.relpath(data.folder, ROOT),
                "models": [],
            }
            sizes.append(size)
            con = duckdb.connect()
            keys = args.models if rows <= 1_000_000 else args.models_above_1e6
            for model in (MODELS[k] for k in keys):
                log(f"{rows:,} rows, {model.key}: floors")
                entry: dict[str, Any] = {"model": model.key, "label": model.label}
                entry["used_bytes"] = used_column_bytes(data, model.columns)
                sql = spark_floor_sql(data.spark_source, model)
                entry["spark_floor"] = best_of(
                    lambda sql=sql: engine.session.sql(sql).collect(), args.repeats, jvm_cpu
                )
                dsql = floor_sql(data.duckdb_source, model)
                entry["duckdb_floor"] = best_of(
                    lambda dsql=dsql, con=con: con.execute(dsql).fetchall(),
                    args.repeats,
                    process_cpu,
                )
                log(f"{rows:,} rows, {model.key}: indb on Spark")
                recorder = Recorder()
                spark = RecordingSpark(engine.session, recorder, jvm_cpu)
                entry["spark"] = measure_fit(model, data.spark_source, spark, recorder)
                if recorder.last_irls_sql:
                    # planning alone (parse, analyse, optimise, physical plan) of the last
                    # IRLS query: the part of a scan that does not grow with the rows
                    explain = "EXPLAIN " + recorder.last_irls_sql
                    entry["spark"]["plan_seconds"] = best_of(
                        lambda explain=explain: engine.session.sql(explain).collect(), 2, jvm_cpu
                    )["best"]
                    entry["spark"]["irls_sql_chars"] = len(recorder.last_irls_sql)
                log(f"{rows:,} rows, {model.key}: indb on DuckDB")
                recorder = Recorder()
                duck = RecordingDuckDB(recorder)
                entry["duckdb"] = measure_fit(model, data.duckdb_source, duck, recorder)
                duck.close()
                if entry["spark"].get("params") and entry["duckdb"].get("params"):
                    entry["agreement"] = agreement(entry["spark"], entry["duckdb"])
                size["models"].append(entry)
                log(summary_line(rows, entry))
            con.close()
    finally:
        engine.close()
    return {
        "started": started.isoformat(timespec="seconds"),
        "finished": dt.datetime.now().isoformat(timespec="seconds"),
        "load_start": load_start,
        "load_end": os.getloadavg(),
        "master": args.master,
        "conf": spark_conf(args),
        "partitions": args.partitions,
        "partition_by": args.partition_by,
        "repeats": args.repeats,
        "spark_start_seconds": spark_start,
        "warmup_seconds": warmup,
        "machine": info,
        "sizes": sizes,
    }


def summary_line(rows: int, e: dict[str, Any]) -> str:
    s = e["spark"]
    if s.get("status") not in ("ok", "not converged"):
        return f"{e['model']}: Spark fit {s.get('status')}"
    floor = e["spark_floor"]["best"]
    return (
        f"{e['model']}: Spark floor {floor:.2f} s, fit {s['seconds']:.1f} s, "
        f"{s['iterations']} iters, {s['s_per_iter']:.2f} s/iter "
        f"({s['s_per_iter'] / floor:.1f}x floor)"
    )


# -- output ----------------------------------------------------------------------------------


def fmt(x: Any, digits: int = 2) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    if isinstance(x, float):
        return f"{x:.{digits}f}"
    return str(x)


def human_bytes(n: float) -> str:
    for unit, k in (("GiB", 1024**3), ("MiB", MIB), ("KiB", 1024)):
        if n >= k:
            return f"{n / k:.1f} {unit}"
    return f"{int(n)} B"


TABLE_HEAD = [
    "rows",
    "model",
    "p",
    "engine",
    "floor s",
    "fit s",
    "iters",
    "s/iter",
    "iter/floor",
    "CPU iter/floor",
    "plan s",
    "Mrows/s per iter",
    "load",
    "queries: profile+sample+levels+IRLS+loglik+edge",
    "back per IRLS scan",
    "p²+p+5 doubles",
    "input read / back",
]


def table_rows(result: dict[str, Any]) -> list[list[str]]:
    out = []
    for size in result["sizes"]:
        for e in size["models"]:
            for eng in ("spark", "duckdb"):
                f = e[eng]
                floor = e[f"{eng}_floor"]["best"]
                floor_cpu = e[f"{eng}_floor"]["cpu"]
                ok = f.get("status") in ("ok", "not converged")
                spi = f.get("s_per_iter", math.nan) if ok else math.nan
                cpi = f.get("cpu_per_iter", math.nan) if ok else math.nan
                row = [
                    f"{size['rows']:,}",
                    e["model"],
                    str(f.get("p", "-")),
                    "Spark" if eng == "spark" else "DuckDB",
                    fmt(floor, 3),
                    fmt(f.get("seconds"), 1) if ok else f["status"][:40],
                    str(f.get("iterations", "-")),
                    fmt(spi, 3),
                    fmt(spi / floor, 1),
                    fmt(cpi / floor_cpu, 1) if floor_cpu > 0 else "-",
                    fmt(f.get("plan_seconds"), 2),
                    fmt(size["rows"] / spi / 1e6, 2),
                    fmt(f.get("load1"), 1),
                ]
                q = f.get("queries")
                if q:
                    back = f["irls_result_bytes"]
                    row += [
                        "+".join(str(q[k]) for k in KINDS[:6]) + other_note(q),
                        f"{human_bytes(back)} ({plural(f['irls_result_rows'], 'row')})",
                        human_bytes(dense_stats_bytes(f["p"])),
                        f"{e['used_bytes'] / back:,.0f}x",
                    ]
                else:
                    row += ["-", "-", "-", "-"]
                out.append(row)
    return out


def other_note(q: dict[str, int]) -> str:
    return f" (+{q['other']} other)" if q.get("other") else ""


def print_table(result: dict[str, Any]) -> None:
    rows = [TABLE_HEAD, *table_rows(result)]
    widths = [max(len(r[j]) for r in rows) for j in range(len(TABLE_HEAD))]
    for i, r in enumerate(rows):
        print("  ".join(c.rjust(w) for c, w in zip(r, widths, strict=True)))
        if i == 0:
            print("  ".join("-" * w for w in widths))
    for size in result["sizes"]:
        for e in size["models"]:
            a = e.get("agreement")
            if a:
                print(
                    f"{size['rows']:,} {e['model']}: Spark vs DuckDB coefficients max rel diff "
                    f"{a['max_rel']:.1e}, max diff / std error {a['max_in_se']:.1e}, "
                    f"deviance rel diff {a['deviance_rel']:.1e}"
                )


def markdown(result: dict[str, Any]) -> str:
    m = result["machine"]
    ls, le = result["load_start"], result["load_end"]
    lines = [
        "# indb on Spark SQL: measured",
        "",
        "Written by `benchmarks/bench_spark.py` (method below); rerun it to refresh. Invented "
        "data from `benchmarks/bench_data.py`.",
        "",
        "**These numbers are noisy.** The machine has "
        f"{m['cores']} cores and was shared with other work during the run (load average "
        f"{ls[0]:.2f} / {ls[1]:.2f} / {ls[2]:.2f} at the start, {le[0]:.2f} / {le[1]:.2f} / "
        f"{le[2]:.2f} at the end; `load` in the results is the 1-minute value as each fit "
        "started). "
        "Absolute seconds will differ from run to run; what carries over is the ratio of one "
        "IRLS scan to the plain scan of the same columns, measured minutes apart in the same "
        "session.",
        "",
        *summary(result),
        "## Machine and run",
        "",
        "| | |",
        "|---|---|",
        f"| CPU | {m['cpu']}, {m['cores']} cores |",
        f"| RAM | {m['ram_gib']:.1f} GiB |",
        f"| OS, Python | {m['os']}, Python {m['python']} |",
        f"| Spark | {m['spark']} (pyspark {m['pyspark']}), master `{result['master']}` |",
        f"| Java | {m['java']} |",
        f"| DuckDB | {m['duckdb']} |",
        f"| indb | commit {m['indb_commit']} |",
        "| Spark settings | "
        + ", ".join(f"`{k}={v}`" for k, v in sorted(result["conf"].items()))
        + " |",
        f"| run | {result['started']} to {result['finished']}; Spark session start "
        f"{result['spark_start_seconds']:.1f} s, warm-up fit {fmt(result['warmup_seconds'], 1)} s "
        "(neither is in any number below) |",
        f"| floors | one warm-up, then best of {result['repeats']} |",
        f"| load average (1/5/15 min) | start {ls[0]:.2f} / {ls[1]:.2f} / {ls[2]:.2f}, end "
        f"{le[0]:.2f} / {le[1]:.2f} / {le[2]:.2f} |",
        "",
        "## Data",
        "",
        "| rows | layout | files | Parquet size |",
        "|---:|---|---:|---:|",
    ]
    for s in result["sizes"]:
        layout = f"Hive folders by `{s['partition_by']}`" if s["partition_by"] else "plain files"
        lines.append(
            f"| {s['rows']:,} | {layout} (`{s['folder']}`) | {s['files']} | "
            f"{human_bytes(s['input_bytes'])} |"
        )
    lines += [
        "",
        "## Results",
        "",
        "| " + " | ".join(TABLE_HEAD) + " |",
        "|" + "|".join("---" if j in (1, 3) else "---:" for j in range(len(TABLE_HEAD))) + "|",
    ]
    lines += ["| " + " | ".join(r) + " |" for r in table_rows(result)]
    lines += [
        "",
        "Models: " + "; ".join(f"`{k}` = {MODELS[k].label}" for k in model_keys(result)) + ".",
        "",
        "## Spark and DuckDB agree",
        "",
        "The same model fitted by the same code on the same files, one engine against the "
        "other (terms matched by name):",
        "",
        "| rows | model | same terms | max relative diff of coefficients | "
        "max diff / std error | deviance relative diff |",
        "|---:|---|---|---:|---:|---:|",
    ]
    for s in result["sizes"]:
        for e in s["models"]:
            a = e.get("agreement")
            if a:
                lines.append(
                    f"| {s['rows']:,} | {e['model']} | {'yes' if a['same_terms'] else 'NO'} | "
                    f"{a['max_rel']:.1e} | {a['max_in_se']:.1e} | {a['deviance_rel']:.1e} |"
                )
    lines += ["", "## Where the time of a Spark fit goes", ""]
    lines += [
        "Engine seconds by query kind (number of queries, total seconds), next to the fit's "
        "wall time; the rest of the wall time is planning in Python and numpy.",
        "",
        "| rows | model | " + " | ".join(f"{k} (n, s)" for k in KINDS) + " | fit s | "
        "IRLS total / floor |",
        "|---:|---|" + "---:|" * (len(KINDS) + 2),
    ]
    for s in result["sizes"]:
        for e in s["models"]:
            f = e["spark"]
            if not f.get("queries"):
                continue
            q, qs = f["queries"], f["query_seconds"]
            cells = " | ".join(f"{q[k]}, {qs[k]:.1f}" if q[k] else "-" for k in KINDS)
            lines.append(
                f"| {s['rows']:,} | {e['model']} | {cells} | "
                f"{f['seconds']:.1f} | {qs['irls'] / e['spark_floor']['best']:.1f} |"
            )
    lines += ["", *METHOD.strip().splitlines(), ""]
    return "\n".join(lines)


def span(values: list[float], digits: int = 1) -> str:
    vals = [v for v in values if math.isfinite(v)]
    if not vals:
        return "-"
    lo, hi = min(vals), max(vals)
    return (
        f"{lo:.{digits}f}"
        if f"{lo:.{digits}f}" == f"{hi:.{digits}f}"
        else (f"{lo:.{digits}f} to {hi:.{digits}f}")
    )


def bytes_span(values: list[int]) -> str:
    lo, hi = human_bytes(min(values)), human_bytes(max(values))
    return lo if lo == hi else f"{lo} to {hi}"


def plural(n: int, word: str) -> str:
    return f"{n} {word}" if n == 1 else f"{n} {word}s"


def summary(result: dict[str, Any]) -> list[str]:
    """A few sentences computed from the measurements (no hand-written numbers)."""
    out = ["## In short", ""]
    for s in result["sizes"]:
        ratios: dict[str, list[float]] = {"spark": [], "duckdb": []}
        cpu: dict[str, list[float]] = {"spark": [], "duckdb": []}
        back, read, rel = [], [], []
        for e in s["models"]:
            for eng in ratios:
                f = e[eng]
                if f.get("status") not in ("ok", "not converged"):
                    continue
                floor = e[f"{eng}_floor"]
                ratios[eng].append(f["s_per_iter"] / floor["best"])
                if floor["cpu"] > 0:
                    cpu[eng].append(f.get("cpu_per_iter", math.nan) / floor["cpu"])
            if e["spark"].get("irls_result_bytes"):
                back.append(e["spark"]["irls_result_bytes"])
                read.append(e["used_bytes"])
            if e.get("agreement"):
                rel.append(e["agreement"]["max_rel"])
        if not back:
            continue
        out.append(
            f"- **{s['rows']:,} rows** ({plural(len(s['models']), 'model')}): one IRLS scan on "
            "Spark took "
            f"{span(ratios['spark'])} times Spark's plain scan of the same columns in wall time "
            f"({span(cpu['spark'])} in CPU time); on DuckDB {span(ratios['duckdb'])} times "
            f"DuckDB's ({span(cpu['duckdb'])} in CPU time). Each IRLS scan sent "
            f"{bytes_span(back)} back to the driver while "
            f"reading {bytes_span(read)} of Parquet columns. "
            f"Spark and DuckDB coefficients agree to {max(rel):.0e} relative or better."
        )
    return [*out, ""] if len(out) > 2 else []


def model_keys(result: dict[str, Any]) -> list[str]:
    seen: list[str] = []
    for s in result["sizes"]:
        for e in s["models"]:
            if e["model"] not in seen:
                seen.append(e["model"])
    return seen


METHOD = """
## Method

- **Data.** `bench_data.py` writes the invented table once per size as one Parquet file
  (cached in `benchmarks/data/`); this script copies it into a folder of `--partitions`
  files of at most rows/N rows each (row groups of up to 125,000 rows, snappy), or with
  `--partition-by c6` into Hive folders `c6=k1/`, ... . Spark is given the folder, DuckDB a
  glob over it. "Parquet size" counts every column; "input read" in the table counts only the
  compressed column chunks of the columns the model reads.
- **Floor** (`floor s`): one query with `count(*)` and a `sum` per column the model reads
  (`length` of the categorical ones) over the same files, in the same Spark session (DuckDB:
  an in-memory connection in the same process); one warm-up, then the best of
  `--repeats` (3). No fit can read its columns faster than this scan.
- **Fit** (`fit s`): the wall time of one `indb.fit(source, response, family, offset=...,
  predictors=[...])` call, after the floors (so the JVM and the page cache are warm). On
  Spark the engine is indb's stock `SparkEngine` over the benchmark's session, wrapped only to
  note each query's kind, engine time and result size. `iters` is the fit's `iterations`;
  `s/iter` is the mean `seconds` of the entries of the fit's `iteration_log` whose phase is
  `"fit"` (one aggregate scan each, including the solve of the update in numpy, which takes
  milliseconds); `iter/floor` divides it by the floor; `Mrows/s per iter` is rows / `s/iter`.
- **CPU** (`CPU iter/floor`): the same ratio in CPU seconds, which depend far less than wall
  seconds on what else the machine is running: the mean CPU seconds of one IRLS query over
  the CPU seconds of the best floor run. For Spark it is the user + system time of the
  driver JVM (`/proc/<pid>/stat`; with `local[N]` the executors are threads of that JVM), so
  it is only available for an in-process driver; for DuckDB it is this process's own time
  (DuckDB's threads run inside it). `load` is the 1-minute load average as the fit started
  (on 2 cores, anything above 2 means the fit shared the CPUs).
- **Warm-up.** Before anything is measured, one untimed Poisson fit runs on a 20,000-row
  `LIMIT` slice of the data, so the first measured fit does not pay for the JVM compiling
  Spark's planner and code generator (a long-lived cluster session has long done that).
- **Planning** (`plan s`, Spark only): `EXPLAIN` of the fit's last IRLS query, best of 2:
  parsing, analysis, optimisation and physical planning without running it. Each IRLS query
  is a new SQL text (the coefficients are literals in it), so every scan pays this once; it
  does not grow with the rows, and it is why small tables show a large `iter/floor`.
- **Queries** (`profile+sample+levels+IRLS+loglik`): every query the fit sent to Spark, by
  kind. `profile` is the one pre-fit scan (row count, NULL exclusions, domain checks, means
  and standard deviations); `sample` reads only the first 100,000 kept rows to decide whether
  folding the table to its distinct design rows would pay (with continuous predictors it
  never does); `levels` is the one scan that counts the levels of the categorical columns
  (none without categorical predictors); `IRLS` is one scan per iteration (plus any
  step-halving rescans); `loglik` is one scan for the log-likelihood at the fitted means,
  for families whose log-likelihood does not follow from the profile sums and the deviance
  (none of the models here); `edge` (binomial only) is one scan counting rows whose fitted
  probability is at or near 0 or 1, for the separation warning.
- **Back per IRLS scan**: the size of the largest IRLS query result fetched to the driver
  (numbers as 8-byte doubles/integers, level labels as UTF-8 text), with its row count. A
  numeric-only model returns one row: the upper triangle of X'WX, X'Wz, deviance, Pearson
  statistic and counts. With categorical predictors the scan groups by the observed cells of
  the categorical columns (at most 6 x 40 = 240 here); executors aggregate rows into those
  cells, and the driver assembles the p x p system from the per-cell sums. `p²+p+5 doubles`
  is the dense system itself (X'WX, X'Wz and five scalars) for comparison; `input read /
  back` divides the compressed bytes of the model's columns by the bytes that came back.
- **DuckDB rows**: the same `indb.fit` call with the default in-memory DuckDB engine
  (threads = cores) on the same files; the agreement table compares its coefficients, term by
  term, with the Spark fit: largest |a - b| / |b|, largest |a - b| / standard error, and the
  relative difference of the deviances. Differences come only from the order of
  floating-point summation.
"""


# -- main ------------------------------------------------------------------------------------


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=parse_rows, default=[1_000_000], help="e.g. 1e6 or 1e6,1e7")
    ap.add_argument("--partitions", type=int, default=8, help="Parquet files per size (about)")
    ap.add_argument(
        "--partition-by",
        choices=("c6", "c40"),
        default=None,
        help="write Hive folders by this categorical column instead of plain files",
    )
    ap.add_argument(
        "--master",
        default="local[2]",
        help="Spark master (local[2], spark://host:7077) or Spark Connect URL sc://host:port",
    )
    ap.add_argument("--driver-memory", default="2g", help="in-process driver only")
    ap.add_argument("--shuffle-partitions", type=int, default=4)
    ap.add_argument("--models", default=DEFAULT_MODELS, help=f"any of {','.join(MODELS)}")
    ap.add_argument(
        "--models-above-1e6",
        default=None,
        help="models for sizes above 10^6 rows (default: --models), to keep a 10^7 run short",
    )
    ap.add_argument("--repeats", type=int, default=3, help="floor scans after one warm-up")
    ap.add_argument(
        "--no-warmup",
        dest="warmup",
        action="store_false",
        help="skip the untimed warm-up fit on 20,000 rows",
    )
    ap.add_argument("--data-dir", default=os.path.join(HERE, "data"))
    ap.add_argument("--out", default=os.path.join(HERE, "SPARK.md"), help="Markdown report")
    ap.add_argument("--report-only", metavar="JSON", help="rewrite the report from saved JSON")
    args = ap.parse_args(argv)
    for opt in ("models", "models_above_1e6"):
        text = getattr(args, opt)
        if text is None:
            continue
        keys = [k.strip() for k in text.split(",") if k.strip()]
        unknown = [k for k in keys if k not in MODELS]
        if unknown or not keys:
            ap.error(
                f"--{opt.replace('_', '-')}: unknown {unknown or text!r}; "
                f"choose from {', '.join(MODELS)}"
            )
        setattr(args, opt, keys)
    if args.models_above_1e6 is None:
        args.models_above_1e6 = args.models
    if args.partitions < 1:
        ap.error(f"--partitions must be at least 1, got {args.partitions}")
    if args.repeats < 1:
        ap.error(f"--repeats must be at least 1, got {args.repeats}")
    if not (args.master.startswith(("local", "spark://", "sc://", "yarn", "k8s://"))):
        ap.error(f"--master {args.master!r}: give local[N], spark://host:port or sc://host:port")
    return args


NOTES_MARK = "<!-- hand-written notes below: kept when the report is regenerated -->"


def kept_notes(path: str) -> str:
    """The hand-written part of an existing report (from NOTES_MARK on), or nothing."""
    try:
        with open(path) as fh:
            text = fh.read()
    except FileNotFoundError:
        return ""
    at = text.find(NOTES_MARK)
    return "" if at < 0 else "\n" + text[at:]


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    raw = os.path.join(args.data_dir, "spark_last_run.json")
    if args.report_only:
        with open(args.report_only) as fh:
            result = json.load(fh)
    else:
        result = run(args)
        os.makedirs(args.data_dir, exist_ok=True)
        with open(raw, "w") as fh:
            json.dump(result, fh, indent=1)
    print_table(result)
    notes = kept_notes(args.out)
    with open(args.out, "w") as fh:
        fh.write(markdown(result) + notes)
    log(f"wrote {args.out}" + ("" if args.report_only else f" and {raw}"))
    return 0


if __name__ == "__main__":
    sys.exit(main())
