"""A one-node SLURM cluster on loopback, started and stopped by the tests that need it.

Everything lives in one temporary folder: the munge key and socket, ``slurm.conf``, the
controller's state, the daemons' logs, the job completion log and wrapper scripts for the
SLURM commands. The three daemons (munged, slurmctld, slurmd) run in the foreground as
children of the test process, so stopping them means signalling exactly the processes this
module started; they also get SIGTERM if the test process dies (``PR_SET_PDEATHSIG``).
Stopping cancels the cluster's jobs first and then kills any process still naming the folder
in its environment (a job step, or a job's process that outlived its parent). A folder whose
owner process died (a test session killed outright) is removed, with its processes, when the
next cluster starts.

Traps this module handles (found while setting such a cluster up by hand):

* The SLURM job-step executor of Snakemake strips ``SLURM_CONF`` before its inner ``srun``,
  which then looks for its configuration through DNS. Wrapper scripts in ``bin/`` set
  ``SLURM_CONF`` and come first on ``PATH``; jobs inherit that ``PATH``.
* Daemons bind to 127.0.0.1 only: the controller and the node are both named ``localhost``
  (which the controller accepts as its own host name whatever the machine is called) and
  ``CommunicationParameters=NoCtldInAddrAny,NoInAddrAny`` makes them bind to the address that
  name resolves to instead of every interface. :meth:`SlurmCluster.listening_addresses`
  lets a test check it.
* Without accounting (no slurmdbd), ``sacct`` fails; Snakemake's SLURM plugin must then use
  ``squeue`` for job states, which works only while the controller still remembers finished
  jobs (``MinJobAge``). Finished jobs are recorded in a job completion log
  (``jobcomp/filetxt``) that tests read instead of ``sacct``.

Needs root, Linux and the Debian packages ``slurm-wlm`` and ``munge`` (installed with apt if
missing, see :func:`ensure_packages`). SLURM 22.05 (Debian 12).
"""

from __future__ import annotations

import contextlib
import ctypes
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

from tests.patience import PATIENCE, patient

PACKAGES = ("slurm-wlm", "munge")
#: the programs the cluster needs (absolute paths: root's PATH may lack /usr/sbin)
PROGRAMS = {
    "munged": "/usr/sbin/munged",
    "slurmctld": "/usr/sbin/slurmctld",
    "slurmd": "/usr/sbin/slurmd",
    "sbatch": "/usr/bin/sbatch",
    "srun": "/usr/bin/srun",
}
#: SLURM commands given a wrapper that sets SLURM_CONF
COMMANDS = ("srun", "sbatch", "squeue", "scontrol", "sinfo", "scancel", "sacct", "sacctmgr",
            "sshare", "salloc", "sstat")
NODE = "localhost"
#: test folders (cluster and workflows) start with this; each records its owner process
PREFIX = "cy-slurm"
OWNER_FILE = "owner.pid"
PARTITION = "debug"
#: seconds a finished job stays visible to squeue (Snakemake's plugin polls with squeue);
#: at least as long as a test may wait for a run, so no record is gone before it is read
MIN_JOB_AGE = max(600, int(PATIENCE))
#: the node offers at least this much, whatever the machine has: rules ask for up to 4 GB
#: and tests may ask for more threads than the machine has cores (nothing is enforced:
#: no cgroups, the node is declared as configured)
MIN_CPUS = 4
MIN_MEMORY_MB = 16000


class ClusterUnavailable(RuntimeError):
    """This machine cannot run the test cluster (not root, not Linux, no apt); skip."""


def packages_missing() -> list[str]:
    """Programs of the cluster not installed on this machine."""
    return [name for name, path in PROGRAMS.items() if not os.access(path, os.X_OK)]


def unavailable_reason() -> str | None:
    """Why this machine cannot host the test cluster, or None when it can."""
    if not sys.platform.startswith("linux"):
        return "the SLURM test cluster needs Linux"
    if os.geteuid() != 0:
        return "the SLURM test cluster needs root (its daemons run as root)"
    if packages_missing() and shutil.which("apt-get") is None:
        return f"SLURM is not installed ({', '.join(packages_missing())}) and apt-get is missing"
    return None


def ensure_packages(log: Path, timeout: float = PATIENCE) -> float:
    """Install the Debian packages of SLURM and munge if missing; return seconds spent.

    Tries ``apt-get install`` first and runs ``apt-get update`` only if that fails (a fresh
    machine may have no package lists). Raises RuntimeError with the end of the apt log.
    """
    if not packages_missing():
        return 0.0
    start = time.monotonic()
    env = {**os.environ, "DEBIAN_FRONTEND": "noninteractive"}
    wait_lock = ["-o", "DPkg::Lock::Timeout=120"]  # a fresh machine may be upgrading itself
    install = ["apt-get", *wait_lock, "install", "-y", "-q", "--no-install-recommends",
               *PACKAGES]
    with log.open("a") as out:
        ok = _run_logged(install, out, env, timeout)
        if not ok:
            _run_logged(["apt-get", *wait_lock, "update", "-q"], out, env, timeout)
            ok = _run_logged(install, out, env, timeout)
    if not ok or packages_missing():
        tail = "\n".join(log.read_text(errors="replace").splitlines()[-15:])
        raise RuntimeError(f"installing {' '.join(PACKAGES)} with apt-get failed:\n{tail}")
    return time.monotonic() - start


def _run_logged(cmd: list[str], out: object, env: dict[str, str], timeout: float) -> bool:
    try:
        return subprocess.run(cmd, stdout=out, stderr=subprocess.STDOUT, env=env,
                              timeout=timeout, check=False).returncode == 0
    except subprocess.TimeoutExpired:
        return False


def free_ports(n: int) -> list[int]:
    """``n`` distinct TCP ports free on 127.0.0.1 right now."""
    socks = []
    try:
        for _ in range(n):
            s = socket.socket()
            s.bind(("127.0.0.1", 0))
            socks.append(s)
        return [s.getsockname()[1] for s in socks]
    finally:
        for s in socks:
            s.close()


def _die_with_parent() -> None:
    """In the child before exec: get SIGTERM when the test process dies."""
    with contextlib.suppress(OSError, AttributeError):
        ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, signal.SIGTERM)  # PR_SET_PDEATHSIG


@dataclass
class SlurmCluster:
    """A running one-node cluster; use :func:`slurm_cluster` to start and stop one."""

    root: Path
    procs: dict[str, subprocess.Popen[bytes]] = field(default_factory=dict)

    @property
    def conf(self) -> Path:
        return self.root / "etc" / "slurm.conf"

    @property
    def jobcomp_log(self) -> Path:
        """One line per finished job (``jobcomp/filetxt``): id, state, limits, resources."""
        return self.root / "log" / "jobcomp.txt"

    def env(self) -> dict[str, str]:
        """The environment for SLURM commands and for Snakemake (wrappers first on PATH)."""
        path = f"{self.root / 'bin'}:{os.environ.get('PATH', '/usr/bin:/bin')}"
        return {**os.environ, "SLURM_CONF": str(self.conf), "PATH": path}

    def command(
        self, *args: str, timeout: float = patient(30)
    ) -> subprocess.CompletedProcess[str]:
        """Run a SLURM command (``squeue``, ``scancel``...) against this cluster."""
        return subprocess.run([str(self.root / "bin" / args[0]), *args[1:]], env=self.env(),
                              capture_output=True, text=True, timeout=timeout, check=False)

    def jobs(self) -> dict[str, dict[str, str]]:
        """Jobs the controller knows (pending, running and recently finished) by job id.

        Fields: ``state``, ``comment`` (Snakemake puts the rule and wildcards there),
        ``name``, ``cpus``, ``time_limit``, ``min_memory``.
        """
        res = self.command("squeue", "--states=all", "--noheader",
                           "--format=%i|%T|%k|%j|%C|%l|%m")
        out: dict[str, dict[str, str]] = {}
        for line in res.stdout.splitlines():
            parts = line.split("|")
            if len(parts) == 7:
                keys = ("state", "comment", "name", "cpus", "time_limit", "min_memory")
                out[parts[0]] = dict(zip(keys, parts[1:], strict=True))
        return out

    def completed_jobs(self) -> dict[str, dict[str, str]]:
        """Records of the job completion log by job id (``JobState``, ``ProcCnt``...)."""
        if not self.jobcomp_log.exists():
            return {}
        out: dict[str, dict[str, str]] = {}
        for line in self.jobcomp_log.read_text().splitlines():
            rec = dict(re.findall(r"(\w+)=(\S*)", line))
            if "JobId" in rec:
                out[rec["JobId"]] = rec
        return out

    def listening_addresses(self) -> set[str]:
        """Local addresses of the TCP sockets our daemons listen on (from /proc)."""
        inodes: set[str] = set()
        for proc in self.procs.values():
            fd_dir = Path(f"/proc/{proc.pid}/fd")
            with contextlib.suppress(OSError):
                for fd in fd_dir.iterdir():
                    with contextlib.suppress(OSError):
                        target = os.readlink(fd)
                        if target.startswith("socket:["):
                            inodes.add(target[8:-1])
        addrs: set[str] = set()
        for table, width in (("/proc/net/tcp", 8), ("/proc/net/tcp6", 32)):
            with contextlib.suppress(OSError):
                for line in Path(table).read_text().splitlines()[1:]:
                    cols = line.split()
                    if cols[3] == "0A" and cols[9] in inodes:  # 0A: LISTEN
                        addrs.add(_decode_address(cols[1].split(":")[0], width))
        return addrs

    def stop(self) -> None:
        """Cancel every job of this cluster, then stop the daemons this object started."""
        if "slurmctld" in self.procs and self.procs["slurmctld"].poll() is None:
            with contextlib.suppress(subprocess.TimeoutExpired, OSError):
                self.command("scancel", "--user=root", timeout=15)
                for _ in range(60):
                    res = self.command("squeue", "--noheader", "--states=running,completing",
                                       "--format=%i", timeout=15)
                    if res.returncode != 0 or not res.stdout.strip():
                        break
                    time.sleep(0.25)
        for name in ("slurmd", "slurmctld", "munged"):
            proc = self.procs.pop(name, None)
            if proc is None or proc.poll() is not None:
                continue
            proc.terminate()
            try:
                proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(timeout=patient(15))
        leftovers = self.job_processes()  # job steps and processes that outlived their jobs
        for pid in leftovers:
            with contextlib.suppress(OSError):
                os.kill(pid, signal.SIGKILL)
        if leftovers:
            print(f"SLURM test cluster: killed {len(leftovers)} processes left by its jobs")

    def job_processes(self) -> list[int]:
        """Processes of this cluster still alive besides its daemons (see processes_of)."""
        daemons = {proc.pid for proc in self.procs.values() if proc.poll() is None}
        return [pid for pid in processes_of(self.root) if pid not in daemons]

    # -- starting -------------------------------------------------------------------------

    def _spawn(self, name: str, *args: str) -> None:
        log = (self.root / "log" / f"{name}.out").open("ab")
        self.procs[name] = subprocess.Popen(
            [PROGRAMS[name], *args], stdin=subprocess.DEVNULL, stdout=log,
            stderr=subprocess.STDOUT, env={**self.env(), "SLURM_CONF": str(self.conf)},
            preexec_fn=_die_with_parent, start_new_session=True,
        )
        log.close()

    def _wait(self, what: str, check: object, timeout: float) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            for name, proc in self.procs.items():
                if proc.poll() is not None:
                    raise RuntimeError(f"{name} exited ({proc.returncode}) while waiting for "
                                       f"{what}; see {self.root / 'log'}")
            if check():  # type: ignore[operator]
                return
            time.sleep(0.25)
        raise RuntimeError(f"timed out after {timeout:.0f} s waiting for {what}; "
                           f"see {self.root / 'log'}")

    def start(self) -> None:
        """Start munged, slurmctld and slurmd; wait until the node takes jobs."""
        r = self.root
        for sub in ("etc", "log", "bin", "state/ctld", "state/d", "munge/etc", "munge/run",
                    "munge/lib", "munge/log"):
            (r / sub).mkdir(parents=True, exist_ok=True)
        for sub in ("", "munge", "munge/run"):
            (r / sub).chmod(0o755)
        for sub in ("munge/etc", "munge/lib", "munge/log"):
            (r / sub).chmod(0o700)
        key = r / "munge/etc/munge.key"
        key.write_bytes(os.urandom(1024))
        key.chmod(0o400)
        sock = r / "munge/run/munge.socket.2"
        self._spawn("munged", "--foreground", f"--key-file={key}", f"--socket={sock}",
                    f"--pid-file={r / 'munge/run/munged.pid'}",
                    f"--log-file={r / 'munge/log/munged.log'}",
                    f"--seed-file={r / 'munge/lib/munged.seed'}")
        self._wait("munged", sock.exists, PATIENCE)
        self._write_conf(sock)
        self._write_wrappers()
        self._spawn("slurmctld", "-D", "-f", str(self.conf))
        self._wait("slurmctld", lambda: self.command("scontrol", "ping").returncode == 0
                   and "UP" in self.command("scontrol", "ping").stdout, PATIENCE)
        self._spawn("slurmd", "-D", "-f", str(self.conf), "-N", NODE)
        self._wait("the node to take jobs", self._node_ready, PATIENCE)
        exposed = {a for a in self.listening_addresses() if not a.startswith("127.")}
        if exposed:
            raise RuntimeError(f"SLURM daemons listen beyond loopback: {sorted(exposed)}")

    def _node_ready(self) -> bool:
        res = self.command("sinfo", "--noheader", "-n", NODE, "-o", "%T")
        return res.stdout.strip().rstrip("*") in ("idle", "mixed", "allocated")

    def _write_conf(self, munge_socket: Path) -> None:
        r = self.root
        cpus, memory = _machine_size()
        ctld_port, node_port = free_ports(2)
        self.conf.write_text(f"""\
ClusterName=chainyard-test
SlurmctldHost={NODE}(127.0.0.1)
SlurmctldPort={ctld_port}
SlurmdPort={node_port}
CommunicationParameters=NoCtldInAddrAny,NoInAddrAny
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CredType=cred/munge
AuthInfo=socket={munge_socket}
StateSaveLocation={r / 'state/ctld'}
SlurmdSpoolDir={r / 'state/d'}
SlurmctldPidFile={r / 'state/slurmctld.pid'}
SlurmdPidFile={r / 'state/slurmd.pid'}
SlurmctldLogFile={r / 'log/slurmctld.log'}
SlurmdLogFile={r / 'log/slurmd.log'}
SlurmctldDebug=info
SlurmdDebug=info
SlurmdParameters=config_overrides
MailProg=/bin/true
ProctrackType=proctrack/pgid
TaskPlugin=task/none
MpiDefault=none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_CPU
ReturnToService=2
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/filetxt
JobCompLoc={self.jobcomp_log}
InactiveLimit=0
KillWait=5
MinJobAge={MIN_JOB_AGE}
SlurmctldTimeout=30
SlurmdTimeout=60
Waittime=0
NodeName={NODE} NodeAddr=127.0.0.1 NodeHostname={NODE} CPUs={max(cpus, MIN_CPUS)} \
RealMemory={max(memory, MIN_MEMORY_MB)} State=UNKNOWN
PartitionName={PARTITION} Nodes={NODE} Default=YES MaxTime=INFINITE State=UP
""")

    def _write_wrappers(self) -> None:
        for name in COMMANDS:
            path = self.root / "bin" / name
            path.write_text(f'#!/bin/sh\nSLURM_CONF={self.conf} exec /usr/bin/{name} "$@"\n')
            path.chmod(0o755)


def _machine_size() -> tuple[int, int]:
    """CPUs and memory (MB) of this machine."""
    memory = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") // 2**20
    return os.cpu_count() or 1, int(memory)


def _decode_address(hexaddr: str, width: int) -> str:
    """An address from /proc/net/tcp{,6} (little-endian words) as text."""
    raw = bytes.fromhex(hexaddr)
    words = b"".join(raw[i:i + 4][::-1] for i in range(0, len(raw), 4))
    family = socket.AF_INET if width == 8 else socket.AF_INET6
    return socket.inet_ntop(family, words)


def processes_of(folder: Path) -> list[int]:
    """Live processes (other than this one) whose environment names ``folder``.

    The daemons get ``SLURM_CONF`` in the folder, job steps inherit it from slurmd, and jobs
    and Snakemake have the folder's wrappers first on ``PATH``.
    """
    marker = str(folder).encode() + b"/"
    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit() or int(entry.name) == os.getpid():
            continue
        with contextlib.suppress(OSError):
            if marker in (entry / "environ").read_bytes():
                found.append(int(entry.name))
    return found


def scratch_parent() -> Path:
    """Where test folders go: the temporary folder, or /tmp when its path is too long for
    munge's socket path (at most 108 bytes)."""
    tmp = tempfile.gettempdir()
    return Path("/tmp") if len(tmp) > 40 else Path(tmp)


def _start_time(pid: int) -> str:
    """Start time of a process (clock ticks since boot; tells a reused pid apart)."""
    return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[19]


def owned_folder(prefix: str) -> Path:
    """A new folder under :func:`scratch_parent` that records this process as its owner."""
    folder = Path(tempfile.mkdtemp(prefix=prefix, dir=scratch_parent()))
    (folder / OWNER_FILE).write_text(f"{os.getpid()} {_start_time(os.getpid())}")
    return folder


def reap_abandoned() -> list[Path]:
    """Remove what killed test sessions left behind: the folders of owners no longer alive,
    and the processes (job steps, jobs) that still name them. Returns the folders removed."""
    removed = []
    for folder in scratch_parent().glob(f"{PREFIX}*"):
        try:
            pid, start = (folder / OWNER_FILE).read_text().split()
            if _start_time(int(pid)) == start:
                continue  # its owner is running
        except ValueError:
            continue  # not one of ours
        except OSError:
            if not (folder / OWNER_FILE).exists():
                continue
        for orphan in processes_of(folder):
            with contextlib.suppress(OSError):
                os.kill(orphan, signal.SIGKILL)
        shutil.rmtree(folder, ignore_errors=True)
        removed.append(folder)
    return removed


@contextlib.contextmanager
def slurm_cluster() -> Iterator[SlurmCluster]:
    """Start a loopback cluster in a new temporary folder; stop it and remove the folder.

    Cleans up even when starting fails half way. Folders and processes that a killed test
    session left behind are removed first (:func:`reap_abandoned`).
    """
    reap_abandoned()
    root = owned_folder(f"{PREFIX}-")
    cluster = SlurmCluster(root)
    try:
        cluster.start()
        yield cluster
    finally:
        cluster.stop()
        shutil.rmtree(root, ignore_errors=True)
