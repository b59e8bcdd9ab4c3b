"""``emulant run``: the workflow as an unattended job (cron, ``make demo``) that recovers by itself.

One run per project folder at a time: the runner holds an exclusive ``fcntl`` lock on
``.snakemake/emulant-run.lock`` for as long as Snakemake runs, so a second run started meanwhile
stops at once with a clear message. Holding that lock, and finding no other Snakemake process
working in the folder, the runner knows that a Snakemake lock left in ``.snakemake/locks`` is
stale (a run killed by ``kill -9``, a power cut or the out-of-memory killer) and removes it with
Snakemake's own ``--unlock``. It then runs Snakemake with ``--rerun-incomplete``, so outputs a
killed job left unfinished (Snakemake's incomplete markers) are made again. Snakemake runs in a
process group of its own; when it ends by a signal, whatever of its jobs is still alive is killed
with the group, and when the runner itself is killed, the kernel sends Snakemake SIGTERM
(``PR_SET_PDEATHSIG``), on which Snakemake stops its jobs. Rule scripts also stop by themselves
when their Snakemake process is gone (:func:`emulant.stages.follow_workflow`).
"""

from __future__ import annotations

import contextlib
import ctypes
import fcntl
import json
import os
import signal
import subprocess
import sys
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import yaml

LOCK_NAME = "emulant-run.lock"
UNLOCK_ALSO = ("--snakefile", "-s", "--directory", "-d")  # options --unlock needs besides the config
EXIT_BUSY = 2
PR_SET_PDEATHSIG = 1  # linux/prctl.h


class RunBusy(Exception):
    """Another run of the same folder is alive."""


@contextlib.contextmanager
def folder_lock(workdir: Path) -> Iterator[None]:
    """Hold the folder's run lock; :class:`RunBusy` at once when another process holds it.

    The kernel drops an ``fcntl`` lock when its process dies, however it dies, so this lock is
    never stale.
    """
    d = workdir / ".snakemake"
    d.mkdir(parents=True, exist_ok=True)
    fh = open(d / LOCK_NAME, "a+", encoding="utf-8")
    try:
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            fh.seek(0)
            holder = fh.read().strip() or "unknown"
            raise RunBusy(f"another run of this folder is alive ({holder}); this one stops "
                          "without touching anything") from None
        fh.seek(0)
        fh.truncate()
        fh.write(f"pid {os.getpid()}")
        fh.flush()
        yield
    finally:
        fh.close()


def snakemake_processes(workdir: Path, exclude: Sequence[int] = ()) -> list[int]:
    """Live Snakemake processes (not zombies) whose working folder is ``workdir`` (Linux /proc)."""
    target = workdir.resolve()
    found = []
    for proc in Path("/proc").iterdir():
        if not proc.name.isdigit() or int(proc.name) in exclude or int(proc.name) == os.getpid():
            continue
        try:
            cmd = (proc / "cmdline").read_bytes().split(b"\0")
            state = (proc / "stat").read_text().rsplit(")", 1)[1].split()[0]
            cwd = (proc / "cwd").resolve()
        except OSError:
            continue
        if state == "Z" or cwd != target:
            continue
        if any(Path(a.decode(errors="replace")).name == "snakemake" or a == b"snakemake"
               for a in cmd[:3]):
            found.append(int(proc.name))
    return found


def stale_locks(workdir: Path) -> list[Path]:
    """Snakemake's lock files in ``workdir`` (stale when no Snakemake works in the folder)."""
    d = workdir / ".snakemake" / "locks"
    return sorted(d.glob("*")) if d.is_dir() else []


def config_args(args: Sequence[str], also: tuple[str, ...] = ()) -> list[str]:
    """The ``--configfile``/``--config`` options of a Snakemake command line (and the options
    named in ``also``, e.g. ``--snakefile`` for ``--unlock``)."""
    out: list[str] = []
    i = 0
    names = ("--configfile", "--configfiles", "--config", "-C", *also)
    while i < len(args):
        a = args[i]
        if a in names:
            out.append(a)
            i += 1
            while i < len(args) and not args[i].startswith("-"):
                out.append(args[i])
                i += 1
            continue
        if a.startswith(tuple(f"{n}=" for n in names if n.startswith("--"))):
            out.append(a)
        i += 1
    return out


def run_config(args: Sequence[str], workdir: Path) -> dict:
    """The run configuration Snakemake will use: ``config/config.yaml``, updated by each
    ``--configfile`` in turn, then by the ``--config KEY=VALUE`` overrides (values read as YAML,
    as Snakemake reads them)."""
    files, overrides = [workdir / "config" / "config.yaml"], []
    key = ""
    for a in config_args(args):
        if a.startswith("-"):
            key, _, value = a.partition("=")
            if not value:
                continue
            a = value
        if key.startswith("--configfile"):
            files.append(workdir / a)
        else:
            overrides.append(a)
    cfg: dict = {}
    for f in files:
        if f.is_file():
            cfg.update(yaml.safe_load(f.read_text(encoding="utf-8")) or {})
    for item in overrides:
        k, _, v = item.partition("=")
        cfg[k] = yaml.safe_load(v) if v else v
    return cfg


def read_config(items: Sequence[str] | None, configfile: str | None) -> dict[str, Any]:
    """The run configuration as Snakemake reads it: the config file, then ``KEY=VALUE`` overrides.

    ``--config FILE`` (one item without ``=``) names the file, as before.
    """
    items = list(items or [])
    if len(items) == 1 and "=" not in items[0]:
        configfile, items = items[0], []
    path = Path(configfile or "config/config.yaml")
    if not path.is_file():
        raise ConfigError([f"config file {path} does not exist"])
    argv = ["--configfile", str(path.resolve())] + (["--config", *items] if items else [])
    try:
        data = run_config(argv, Path.cwd())
    except yaml.YAMLError as exc:
        raise ConfigError([f"{path}: not valid YAML ({str(exc).splitlines()[0]})"]) from None
    bad = [i for i in items if "=" not in i]
    if bad:
        raise ConfigError([f"--config {b}: expected KEY=VALUE" for b in bad])
    if not data.get("protocol"):
        raise ConfigError([f"{path}: key protocol is missing (the protocol file)"])
    return data


class ConfigError(Exception):
    """A run configuration that cannot be read; ``problems`` lists why."""

    def __init__(self, problems: list[str]):
        self.problems = problems
        super().__init__("; ".join(problems))


def latest_report(reports_dir: Path) -> str | None:
    """The report of the ledger's last line, or None when there is no ledger yet."""
    ledger = reports_dir / "ledger.jsonl"
    if not ledger.is_file():
        return None
    lines = [ln for ln in ledger.read_text(encoding="utf-8").splitlines() if ln.strip()]
    if not lines:
        return None
    entry = json.loads(lines[-1])
    if not isinstance(entry, dict) or not entry.get("report"):
        return None
    return str(reports_dir / entry["report"])  # relative to the ledger's folder (older lines: absolute)


def _die_with_parent() -> None:  # runs in the child between fork and exec
    with contextlib.suppress(OSError, AttributeError):
        ctypes.CDLL("libc.so.6", use_errno=True).prctl(PR_SET_PDEATHSIG, signal.SIGTERM)


def run_workflow(args: Sequence[str], workdir: Path, snakemake: Sequence[str] | None = None,
                 say=print) -> int:
    """Run Snakemake in ``workdir`` with ``args`` under the folder lock; returns its exit code.

    Raises :class:`RunBusy` when another run of the folder is alive.
    """
    cmd = list(snakemake or [sys.executable, "-m", "snakemake"])
    with folder_lock(workdir):
        others = snakemake_processes(workdir)
        if others:
            raise RunBusy(f"Snakemake is running in this folder already (pid {', '.join(map(str, others))});"
                          " this run stops without touching anything")
        if stale_locks(workdir):
            say("emulant: a stale lock left by an interrupted run was found (no run of this folder "
                "is alive); unlocking with snakemake --unlock")
            unlock = subprocess.run([*cmd, "--unlock", *config_args(args, UNLOCK_ALSO)], cwd=workdir,
                                    capture_output=True, text=True)
            if unlock.returncode != 0:
                raise RunBusy("snakemake --unlock failed: " + (unlock.stderr.strip().splitlines() or ["?"])[-1])
        proc = subprocess.Popen([*cmd, "--rerun-incomplete", *args], cwd=workdir,
                                start_new_session=True, preexec_fn=_die_with_parent)
        forward = {s: signal.signal(s, lambda sig, _f: proc.send_signal(sig))
                   for s in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP)}
        try:
            code = proc.wait()
        finally:
            for s, h in forward.items():
                signal.signal(s, h)
            with contextlib.suppress(ProcessLookupError, PermissionError):
                os.killpg(proc.pid, signal.SIGKILL)  # any job Snakemake left behind
        return code


# ----------------------------------------------------------------------------- inside a rule job


def _proc_info(pid: int) -> tuple[int, str, list[bytes]] | None:
    """(parent pid, start time, argv) of a live process, or None (gone or a zombie)."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
        argv = Path(f"/proc/{pid}/cmdline").read_bytes().split(b"\0")
    except OSError:
        return None
    fields = stat.rsplit(")", 1)[1].split()
    if fields[0] == "Z":
        return None
    return int(fields[1]), fields[19], argv


def _is_snakemake(argv: list[bytes]) -> bool:
    head = [a.decode(errors="replace") for a in argv[:3]]
    return any(Path(a).name == "snakemake" for a in head) or "-m snakemake" in " ".join(head)


def workflow_process(pid: int | None = None) -> tuple[int, str] | None:
    """The outermost Snakemake process above ``pid`` (default: this one) as (pid, start time)."""
    found = None
    info = _proc_info(pid or os.getpid())
    while info is not None and info[0] > 1:
        parent = info[0]
        info = _proc_info(parent)
        if info is not None and _is_snakemake(info[2]):
            found = (parent, info[1])
    return found


def _descendants(pid: int) -> list[int]:
    children: dict[int, list[int]] = {}
    for proc in Path("/proc").iterdir():
        if proc.name.isdigit() and (info := _proc_info(int(proc.name))) is not None:
            children.setdefault(info[0], []).append(int(proc.name))
    out, todo = [], [pid]
    while todo:
        for c in children.get(todo.pop(), []):
            out.append(c)
            todo.append(c)
    return out


def follow_workflow(interval: float = 1.0) -> bool:
    """Stop this rule job (and its worker processes) as soon as its Snakemake process is gone.

    A job whose Snakemake was killed (``kill -9``, the out-of-memory killer) would otherwise run
    on and write its outputs into a folder the next run is already working in. A daemon thread
    checks the outermost Snakemake process above this one every ``interval`` seconds; when it has
    ended (or its pid was reused) it kills this process's descendants and exits with code 3,
    writing nothing more. Returns False when no Snakemake process is above this one.
    """
    import threading
    import time

    watched = workflow_process()
    if watched is None:
        return False

    def watch() -> None:
        while True:
            time.sleep(interval)
            info = _proc_info(watched[0])
            if info is None or info[1] != watched[1]:
                for child in _descendants(os.getpid()):
                    with contextlib.suppress(OSError):
                        os.kill(child, signal.SIGKILL)
                os._exit(3)

    threading.Thread(target=watch, name="follow-workflow", daemon=True).start()
    return True
