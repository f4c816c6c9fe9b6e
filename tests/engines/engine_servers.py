"""Start and stop the real servers the engine tests run against (loopback only).

* :func:`start_postgres`: a throwaway PostgreSQL cluster (initdb into a temporary folder,
  fsync off, loopback port + private unix socket), used when ``INDB_TEST_POSTGRES_URL`` is not
  given (``.ci/services.sh start`` gives it in CI).
* :func:`start_spark_cluster`: a Spark standalone master, one worker and a Spark Connect server,
  each a separate JVM started from the scripts and jars shipped inside the pyspark package.

Every process is started in its own process group and stopped by that group's id.
"""

from __future__ import annotations

import contextlib
import glob
import os
import shutil
import signal
import socket
import subprocess
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path


class ServerUnavailable(RuntimeError):
    """A server could not be started here (missing binaries, failed start-up)."""


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_for(check: Callable[[], bool], seconds: float, what: str, log: Path | None) -> None:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if check():
            return
        time.sleep(0.2)
    tail = log.read_text(errors="replace")[-3000:] if log is not None and log.exists() else ""
    raise ServerUnavailable(f"{what} did not come up within {seconds:.0f} s\n{tail}")


def port_open(port: int) -> bool:
    with socket.socket() as s:
        s.settimeout(0.5)
        return s.connect_ex(("127.0.0.1", port)) == 0


@dataclass
class Processes:
    """Process groups started by a fixture, stopped newest first."""

    procs: list[subprocess.Popen] = field(default_factory=list)

    def start(self, cmd: list[str], log: Path, env: dict[str, str]) -> subprocess.Popen:
        with open(log, "wb") as out:
            p = subprocess.Popen(
                cmd,
                stdout=out,
                stderr=subprocess.STDOUT,
                stdin=subprocess.DEVNULL,
                env=env,
                start_new_session=True,  # its own process group, so children stop with it
            )
        self.procs.append(p)
        return p

    def stop(self) -> None:
        for p in reversed(self.procs):
            with contextlib.suppress(ProcessLookupError):
                os.killpg(p.pid, signal.SIGTERM)
        for p in reversed(self.procs):
            try:
                p.wait(timeout=30)
            except subprocess.TimeoutExpired:
                with contextlib.suppress(ProcessLookupError):
                    os.killpg(p.pid, signal.SIGKILL)
                p.wait(timeout=10)
            # executors of a worker share its group; make sure none outlives it
            with contextlib.suppress(ProcessLookupError):
                os.killpg(p.pid, signal.SIGKILL)
        self.procs.clear()


# -- PostgreSQL -------------------------------------------------------------------------------


def postgres_bindir() -> Path | None:
    """Newest server binaries from Debian's postgresql package (or initdb on PATH)."""
    dirs = sorted(
        glob.glob("/usr/lib/postgresql/*/bin"), key=lambda d: int(Path(d).parent.name or 0)
    )
    for d in reversed(dirs):
        if (Path(d) / "initdb").exists():
            return Path(d)
    initdb = shutil.which("initdb")
    return Path(os.path.realpath(initdb)).parent if initdb else None


def start_postgres(root: Path) -> tuple[str, Callable[[], None]]:
    """A throwaway cluster under ``root``; returns (URL, stop)."""
    bindir = postgres_bindir()
    if bindir is None:
        raise ServerUnavailable(
            "no PostgreSQL server binaries (install them: bash .ci/services.sh install)"
        )
    as_root = os.geteuid() == 0
    # initdb and pg_ctl refuse to run as root
    prefix = ["runuser", "-u", "postgres", "--"] if as_root else []
    root.mkdir(parents=True, exist_ok=True)
    root.chmod(0o755)  # the postgres user must reach the cluster folder
    data, sock = root / "pgdata", root / "socket"
    data.mkdir()
    sock.mkdir()
    if as_root:
        shutil.chown(data, "postgres", "postgres")
        shutil.chown(sock, "postgres", "postgres")
    init = subprocess.run(
        [*prefix, str(bindir / "initdb"), "-D", str(data), "-U", "postgres", "--auth=trust"]
        + ["--encoding=UTF8", "--no-locale", "--no-sync"],
        capture_output=True,
        text=True,
    )
    if init.returncode != 0:
        raise ServerUnavailable(f"initdb failed: {init.stderr[-2000:]}")
    port = free_port()
    opts = (
        f"-c listen_addresses=127.0.0.1 -p {port} -k {sock} -c fsync=off "
        "-c synchronous_commit=off -c full_page_writes=off"
    )
    log = sock / "server.log"
    started = subprocess.run(
        [*prefix, str(bindir / "pg_ctl"), "-D", str(data), "-l", str(log), "-w", "-t", "60"]
        + ["-o", opts, "start"],
        capture_output=True,
        text=True,
    )
    if started.returncode != 0:
        tail = log.read_text(errors="replace")[-2000:] if log.exists() else started.stderr
        raise ServerUnavailable(f"pg_ctl start failed: {tail}")

    def stop() -> None:
        subprocess.run(
            [*prefix, str(bindir / "pg_ctl"), "-D", str(data), "-m", "immediate", "-w", "stop"],
            capture_output=True,
        )
        shutil.rmtree(root, ignore_errors=True)

    return f"postgresql://postgres@127.0.0.1:{port}/postgres", stop


# -- Spark standalone + Spark Connect -----------------------------------------------------------


def spark_home() -> Path:
    import pyspark

    return Path(pyspark.__file__).parent


# Test JVMs live for minutes on 2 cores: the C1 compiler alone and the serial collector leave
# more CPU for the queries than tiered C2 compilation and parallel GC threads do.
TEST_JVM_OPTIONS = "-XX:TieredStopAtLevel=1 -XX:+UseSerialGC"


def start_spark_cluster(root: Path) -> tuple[str, Callable[[], None]]:
    """Master + one worker + Spark Connect server on loopback; returns (sc:// URL, stop)."""
    if shutil.which("java") is None and not os.environ.get("JAVA_HOME"):
        raise ServerUnavailable("no Java runtime (install one: bash .ci/services.sh install)")
    home = spark_home()
    root.mkdir(parents=True, exist_ok=True)
    env = dict(os.environ)
    env.update(
        SPARK_HOME=str(home),
        SPARK_LOCAL_IP="127.0.0.1",
        SPARK_LOCAL_DIRS=str(root / "local"),
        SPARK_WORKER_DIR=str(root / "work"),
        SPARK_LOG_DIR=str(root / "logs"),
        # no REST submission server on its fixed port 6066
        SPARK_MASTER_OPTS="-Dspark.master.rest.enabled=false",
        SPARK_DAEMON_JAVA_OPTS=TEST_JVM_OPTIONS,
    )
    env.pop("PYSPARK_SUBMIT_ARGS", None)
    procs = Processes()
    master_port, connect_port = free_port(), free_port()
    master_url = f"spark://127.0.0.1:{master_port}"
    spark_class = str(home / "bin" / "spark-class")
    try:
        master_log = root / "master.log"
        procs.start(
            [spark_class, "org.apache.spark.deploy.master.Master", "--host", "127.0.0.1"]
            + ["--port", str(master_port), "--webui-port", str(free_port())],
            master_log,
            env,
        )
        wait_for(lambda: "ALIVE" in _read(master_log), 90, "Spark master", master_log)
        # worker and Connect server start side by side: the server's application waits for
        # the worker's executor
        worker_log = root / "worker.log"
        procs.start(
            [spark_class, "org.apache.spark.deploy.worker.Worker", "--host", "127.0.0.1"]
            + ["--cores", "2", "--memory", "2g", "--webui-port", str(free_port())]
            + ["--work-dir", str(root / "work"), master_url],
            worker_log,
            env,
        )
        connect_log = root / "connect.log"
        conf = {
            "spark.connect.grpc.binding.address": "127.0.0.1",
            "spark.connect.grpc.binding.port": str(connect_port),
            "spark.driver.host": "127.0.0.1",
            "spark.driver.bindAddress": "127.0.0.1",
            "spark.ui.enabled": "false",
            "spark.sql.shuffle.partitions": "4",
            "spark.executor.memory": "1g",
            "spark.executor.extraJavaOptions": TEST_JVM_OPTIONS,
            "spark.cores.max": "2",
            # registry tables written by the write-back tests go here, not into the cwd
            "spark.sql.warehouse.dir": str(root / "warehouse"),
        }
        cmd = [str(home / "bin" / "spark-submit"), "--master", master_url]
        cmd += ["--class", "org.apache.spark.sql.connect.service.SparkConnectServer"]
        cmd += ["--name", "indb-tests-connect", "--driver-memory", "1g"]
        cmd += ["--driver-java-options", TEST_JVM_OPTIONS]
        for key, val in conf.items():
            cmd += ["--conf", f"{key}={val}"]
        procs.start(cmd, connect_log, env)
        registered = "Successfully registered with master"
        wait_for(lambda: registered in _read(worker_log), 90, "Spark worker", worker_log)
        started = "Spark Connect server started"
        wait_for(
            lambda: started in _read(connect_log) and port_open(connect_port),
            120,
            "Spark Connect server",
            connect_log,
        )
    except BaseException:
        procs.stop()
        raise

    def stop() -> None:
        procs.stop()
        shutil.rmtree(root, ignore_errors=True)

    return f"sc://127.0.0.1:{connect_port}", stop


def _read(path: Path) -> str:
    try:
        return path.read_text(errors="replace")
    except FileNotFoundError:
        return ""
