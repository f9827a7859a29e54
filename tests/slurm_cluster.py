"""A real one-node SLURM cluster for the tests (`tests/test_slurm.py`).

munged, slurmctld and slurmd from the Debian packages (``apt-get install slurm-wlm munge``;
`.ci/run` installs them), started as root in a private directory: their own munge key and
socket, their own free ports, state and spool directories and slurm.conf (found through
``SLURM_CONF``), so that they disturb no other SLURM or munge on the machine. One node with
the machine's cores, one partition ``compute`` (the queue of the README's examples),
``ProctrackType=proctrack/linuxproc`` and ``TaskPlugin=task/none`` (no cgroups needed).
The daemons run in the foreground as children of the test process (``-F`` / ``-D``), so
that `SlurmCluster.stop` can stop exactly them, after cancelling every job of the cluster.
"""

import os
import shutil
import signal
import socket
import subprocess
import time
from pathlib import Path

PARTITION = "compute"
DAEMONS = ("munged", "slurmctld", "slurmd")
CLIENTS = ("sbatch", "squeue", "scancel", "scontrol", "sinfo", "mungekey")
#: job states after which a job no longer runs (scontrol show job)
FINISHED = {"COMPLETED", "CANCELLED", "FAILED", "TIMEOUT", "NODE_FAIL", "PREEMPTED",
            "OUT_OF_MEMORY", "BOOT_FAIL", "DEADLINE"}


class SlurmUnavailable(Exception):
    """No cluster can be started here; the message says why."""


def _which(name):
    for d in (None, "/usr/sbin", "/usr/bin", "/sbin"):
        path = shutil.which(name, path=d)
        if path:
            return path
    return None


def _free_ports(n):
    socks = [socket.socket() for _ in range(n)]
    try:
        for s in socks:
            s.bind(("127.0.0.1", 0))
        return [s.getsockname()[1] for s in socks]
    finally:
        for s in socks:
            s.close()


def _tail(path, lines=5):
    try:
        return " | ".join(Path(path).read_text(errors="replace").splitlines()[-lines:])
    except OSError:
        return "(no log)"


class SlurmCluster:
    """A running one-node cluster; ``env`` is what clients (and jobs) need."""

    def __init__(self, root):
        self.root = Path(root)
        self.daemons = {}  # name -> Popen
        self.binaries = {}
        self.start_seconds = None
        missing = [n for n in DAEMONS + CLIENTS if _which(n) is None]
        if missing:
            raise SlurmUnavailable(f"{', '.join(missing)} not found (apt-get install slurm-wlm munge)")
        if os.geteuid() != 0:
            raise SlurmUnavailable("the daemons are started as root; this is not root")
        self.binaries = {n: _which(n) for n in DAEMONS + CLIENTS}
        self.node = socket.gethostname().split(".")[0]
        self.conf = self.root / "slurm.conf"
        self.env = {**os.environ, "SLURM_CONF": str(self.conf)}

    # -- start and stop -----------------------------------------------------------------------

    def start(self, timeout=60.0):
        t0 = time.perf_counter()
        r = self.root
        for d in ("state", "spool", "munge"):
            (r / d).mkdir(parents=True, exist_ok=True)
        os.chmod(r / "munge", 0o700)
        key = r / "munge" / "munge.key"
        self._run(["mungekey", "--create", f"--keyfile={key}", "--force"])
        os.chmod(key, 0o400)
        self.socket = r / "munge" / "munge.socket"
        self._daemon("munged", "--foreground", "--force", f"--socket={self.socket}",
                     f"--key-file={key}", f"--log-file={r / 'munged.log'}",
                     f"--pid-file={r / 'munged.pid'}", f"--seed-file={r / 'munge' / 'munged.seed'}")
        self._wait_for(lambda: self.socket.exists(), "munged", 20)
        ctld_port, slurmd_port = _free_ports(2)
        cores = os.cpu_count() or 1
        memory_mb = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") // 2**20
        self.conf.write_text(f"""\
# a private one-node test cluster (tests/slurm_cluster.py)
ClusterName=tbatest
SlurmctldHost={self.node}
SlurmctldPort={ctld_port}
SlurmdPort={slurmd_port}
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
AuthInfo=socket={self.socket}
CredType=cred/munge
StateSaveLocation={r / 'state'}
SlurmdSpoolDir={r / 'spool'}
SlurmctldPidFile={r / 'slurmctld.pid'}
SlurmdPidFile={r / 'slurmd.pid'}
SlurmctldLogFile={r / 'slurmctld.log'}
SlurmdLogFile={r / 'slurmd.log'}
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
ReturnToService=2
MpiDefault=none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/none
SlurmdParameters=config_overrides
KillWait=5
NodeName={self.node} CPUs={cores} RealMemory={memory_mb} State=UNKNOWN
PartitionName={PARTITION} Nodes={self.node} Default=YES MaxTime=INFINITE State=UP
""")
        self._daemon("slurmctld", "-D", "-f", str(self.conf))
        self._daemon("slurmd", "-D", "-f", str(self.conf))

        def idle():
            return subprocess.run([self.binaries["sinfo"], "-h", "-o", "%T"], env=self.env,
                                  capture_output=True, text=True, timeout=30).stdout.strip() == "idle"

        self._wait_for(idle, "the node", timeout)
        self.start_seconds = time.perf_counter() - t0
        return self

    def _daemon(self, name, *args):
        log = open(self.root / f"{name}.out", "wb")
        with log:
            self.daemons[name] = subprocess.Popen([self.binaries[name], *args], env=self.env,
                                                  stdin=subprocess.DEVNULL, stdout=log,
                                                  stderr=subprocess.STDOUT)

    def _wait_for(self, ready, what, timeout):
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            for name, p in self.daemons.items():
                if p.poll() is not None:
                    raise SlurmUnavailable(f"{name} exited with code {p.returncode}: "
                                           f"{self._log(name)}")
            if ready():
                return
            time.sleep(0.1)
        raise SlurmUnavailable(f"{what} not ready after {timeout:.0f} s; "
                               + "; ".join(f"{n}: {self._log(n)}" for n in self.daemons))

    def _log(self, name):
        text = _tail(self.root / f"{name}.out")
        log = self.root / f"{name}.log"
        return f"{text} {_tail(log)}" if log.exists() else text

    def _run(self, cmd):
        proc = subprocess.run([self.binaries[cmd[0]], *cmd[1:]], env=self.env,
                              capture_output=True, text=True, timeout=60)
        if proc.returncode != 0:
            raise SlurmUnavailable(f"{cmd[0]} failed (exit {proc.returncode}): "
                                   f"{(proc.stderr or proc.stdout).strip()[:300]}")
        return proc.stdout

    def processes(self, job=None):
        """Pids of the processes this cluster started for jobs (their environment carries
        our SLURM_CONF), of one job (SLURM_JOB_ID or SLURM_ARRAY_JOB_ID) if given."""
        mine = f"SLURM_CONF={self.conf}".encode()
        found = []
        for d in Path("/proc").iterdir():
            if not d.name.isdigit() or int(d.name) == os.getpid():
                continue
            try:
                env = (d / "environ").read_bytes().split(b"\0")
            except OSError:
                continue
            if mine not in env or any(p.poll() is None and p.pid == int(d.name)
                                      for p in self.daemons.values()):
                continue
            ids = {e.split(b"=", 1)[1].decode() for e in env
                   if e.startswith((b"SLURM_JOB_ID=", b"SLURM_ARRAY_JOB_ID="))}
            if job is None or str(job) in ids:
                found.append(int(d.name))
        return found

    def stop(self):
        """Cancel every job of this cluster, wait for them, then stop the daemons we started
        and any job process that outlived them (found by our SLURM_CONF in its environment)."""
        ctld = self.daemons.get("slurmctld")
        if ctld is not None and ctld.poll() is None:
            subprocess.run([self.binaries["scancel"], "--full", "--user=root"], env=self.env,
                           capture_output=True, timeout=30)
            deadline = time.monotonic() + 30
            while time.monotonic() < deadline and self.squeue():
                time.sleep(0.2)
        for name in ("slurmd", "slurmctld", "munged"):
            p = self.daemons.pop(name, None)
            if p is None or p.poll() is not None:
                continue
            p.send_signal(signal.SIGTERM)
            try:
                p.wait(timeout=15)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait()
        for pid in self.processes():
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass

    # -- jobs ---------------------------------------------------------------------------------

    def sbatch(self, script, *options, cwd, env=None):
        """Submit ``script`` (a path); returns the job id."""
        proc = subprocess.run([self.binaries["sbatch"], "--parsable", *options, str(script)],
                              cwd=cwd, env=env or self.env, capture_output=True, text=True,
                              timeout=30)
        assert proc.returncode == 0, proc.stderr
        return proc.stdout.strip().split(";")[0]

    def squeue(self):
        """Ids of the jobs still pending or running."""
        out = subprocess.run([self.binaries["squeue"], "-h", "-o", "%i"], env=self.env,
                             capture_output=True, text=True, timeout=30).stdout
        return out.split()

    def states(self, job):
        """{array task id (or None): job state} of a job (or job array)."""
        out = subprocess.run([self.binaries["scontrol"], "show", "job", "-o", job], env=self.env,
                             capture_output=True, text=True, timeout=30).stdout
        states = {}
        for line in out.splitlines():
            fields = dict(f.split("=", 1) for f in line.split() if "=" in f)
            task = fields.get("ArrayTaskId")
            states[int(task) if task and task.isdigit() else None] = fields.get("JobState")
        return states

    def wait(self, job, timeout=120.0):
        """Wait until every element of ``job`` has finished and its processes are gone
        (a cancelled job is CANCELLED at once but stays in squeue while it is completing);
        returns their states."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            states = self.states(job)
            if (states and all(s in FINISHED for s in states.values())
                    and not any(j.split("_")[0] == job for j in self.squeue())):
                return states
            time.sleep(0.2)
        raise AssertionError(f"job {job} still not finished after {timeout:.0f} s: "
                             f"{self.states(job)}")

    def scontrol(self, *args):
        return self._run(["scontrol", *args])

    def scancel(self, *args):
        return self._run(["scancel", *args])
