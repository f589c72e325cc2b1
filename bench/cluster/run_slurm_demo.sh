#!/usr/bin/env bash
# Run the demo on a real single-node SLURM cluster and check it gives the same bytes as a local run.
#
# As root on a Debian machine (12 or later), inside the project's activated virtual environment:
#
#   bash bench/cluster/run_slurm_demo.sh [WORK_DIR]        (default WORK_DIR: /tmp/regimewise-slurm)
#
# REUSE_LOCAL=1 keeps a finished local run from an earlier call instead of running it again.
#
# It installs munge, slurmctld and slurmd from Debian's packages; writes a slurm.conf for this machine alone
# (its host name, CPUs and memory read at run time; accounting off, proctrack/linuxproc, task/none; one
# partition named like the profile's slurm_partition) to /etc/slurm/slurm.conf, keeping any earlier one aside
# and putting it back at the end; starts munged (unless one already answers), slurmctld
# and slurmd by hand, without systemd; installs the Snakemake SLURM executor plugin into the active venv; runs
# the demo locally (`regimewise demo`) into WORK_DIR/local and through SLURM (`regimewise demo --profile`,
# config/profiles/slurm plus squeue status for this accounting-free cluster) into WORK_DIR/slurm; checks from the executor's job logs, the controller's job-completion record and a squeue
# poll that every stage and every bootstrap shard ran as its own SLURM job; compares every artifact of the two
# runs by SHA-256; and stops every daemon it started (also on failure or Ctrl-C).
# Not part of CI: it changes the machine (packages, daemons) and takes 12 to 18 minutes on 2 cores.
set -Eeuo pipefail

REPO="$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)"
WORK="$(mkdir -p "${1:-/tmp/regimewise-slurm}" && cd "${1:-/tmp/regimewise-slurm}" && pwd)"
PROFILE="$REPO/config/profiles/slurm"
PROTOCOL="$REPO/config/protocol.yaml"
PLUGIN_SPEC='snakemake-executor-plugin-slurm>=2.8,<3'
CLUSTER="$WORK/cluster"   # state, spool and daemon logs of this test cluster
# The configuration goes to the default path: the executor's job step removes SLURM_* variables (SLURM_CONF
# too) before it calls srun inside each job, so a configuration elsewhere would not be found there.
CONF=/etc/slurm/slurm.conf
MARKER="# single-node test cluster written by bench/cluster/run_slurm_demo.sh"
CONF_BACKUP="$CONF.before-regimewise"
unset SLURM_CONF

STARTED_PIDS=()    # daemons and helpers this script started, stopped in reverse order
say() { printf '[%(%H:%M:%S)T] %s\n' -1 "$*"; }
die() { say "error: $*" >&2; exit 1; }

# ------------------------------------------------------------------------------------------- preconditions
preflight() {
    [[ $EUID -eq 0 ]] || die "run as root (it installs packages and starts daemons)"
    [[ -r /etc/debian_version ]] || die "this script uses Debian's packages (apt-get); not a Debian machine"
    [[ -n "${VIRTUAL_ENV:-}" ]] || die "activate the project's virtual environment first (pip install -e .)"
    python -c "import regimewise" 2>/dev/null || die "regimewise is not installed in $VIRTUAL_ENV (pip install -e $REPO)"
    [[ -f "$PROFILE/profile.yaml" ]] || die "missing $PROFILE/profile.yaml"
}

install_packages() {
    local missing=()
    for pkg in munge slurmctld slurmd slurm-client; do
        dpkg-query -W -f='${Status}' "$pkg" 2>/dev/null | grep -q "install ok installed" || missing+=("$pkg")
    done
    if ((${#missing[@]})); then
        say "installing ${missing[*]} from Debian's packages"
        apt-get update -qq
        DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends "${missing[@]}" >/dev/null
    fi
    # Debian's postinst scripts enable systemd units; nothing here uses them (the daemons are started below by
    # hand). A slurmctld or slurmd already running would serve another configuration: refuse rather than stop it.
    for daemon in slurmctld slurmd; do
        if pgrep -x "$daemon" >/dev/null; then
            die "a $daemon is already running (pid $(pgrep -x "$daemon" | tr '\n' ' ')); stop it, then run again"
        fi
    done
    say "packages: $(dpkg-query -W -f='${Package} ${Version}  ' munge slurmctld slurmd)"
    if ! python -c "import snakemake_executor_plugin_slurm" 2>/dev/null; then
        say "installing $PLUGIN_SPEC into $VIRTUAL_ENV"
        python -m pip install -q "$PLUGIN_SPEC"
    fi
    say "executor plugin: $(python -m pip show snakemake-executor-plugin-slurm | sed -n 's/^Version: //p')"
}

# ---------------------------------------------------------------------------------------------- the cluster
profile_partition() {  # the partition the profile asks for, so the test cluster offers exactly that one
    python - "$PROFILE/profile.yaml" <<'EOF'
import sys, yaml
print(yaml.safe_load(open(sys.argv[1]))["default-resources"]["slurm_partition"])
EOF
}

write_slurm_conf() {
    local host node partition
    host="$(hostname -s)"
    # slurmd -C prints this machine's NodeName line (CPUs, sockets, cores, threads, RealMemory in MB)
    node="$(slurmd -C | head -n 1)"
    [[ "$node" == NodeName=* ]] || die "slurmd -C did not describe this node: $node"
    partition="$(profile_partition)"
    rm -rf "$CLUSTER"
    mkdir -p "$CLUSTER"/{state,spool,log}
    chown slurm:slurm "$CLUSTER/state" "$CLUSTER/log"
    mkdir -p "$(dirname "$CONF")"
    if [[ -e "$CONF" ]] && ! grep -qxF "$MARKER" "$CONF"; then
        [[ -e "$CONF_BACKUP" ]] && die "$CONF_BACKUP exists from an earlier run; put it back as $CONF first"
        mv "$CONF" "$CONF_BACKUP"
        say "kept the existing $CONF aside as $CONF_BACKUP (put back at the end)"
    fi
    cat >"$CONF" <<EOF
$MARKER
ClusterName=regimewise-test
SlurmctldHost=$host
SlurmUser=slurm
AuthType=auth/munge
CredType=cred/munge
StateSaveLocation=$CLUSTER/state
SlurmdSpoolDir=$CLUSTER/spool
SlurmctldPidFile=$CLUSTER/slurmctld.pid
SlurmdPidFile=$CLUSTER/slurmd.pid
SlurmctldLogFile=$CLUSTER/log/slurmctld.log
SlurmdLogFile=$CLUSTER/log/slurmd.log
SlurmctldDebug=info
SlurmdDebug=info
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
MpiDefault=none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
ReturnToService=2
# no accounting database; finished jobs stay visible to squeue for 10 minutes (the executor's squeue status
# checks need at least 120 s), and the controller writes one line per finished job to a plain file
AccountingStorageType=accounting_storage/none
JobAcctGatherType=jobacct_gather/none
JobCompType=jobcomp/filetxt
JobCompLoc=$CLUSTER/log/jobcomp.txt
MinJobAge=600
$node State=UNKNOWN
PartitionName=$partition Nodes=$host Default=YES MaxTime=INFINITE State=UP
EOF
    : >"$CLUSTER/log/jobcomp.txt"
    chown slurm:slurm "$CLUSTER/log/jobcomp.txt"
    say "wrote $CONF: $node; partition $partition"
}

start_munge() {
    if munge -n 2>/dev/null | unmunge >/dev/null 2>&1; then
        say "munged already answers; using it (not started, so not stopped, by this script)"
        return
    fi
    if [[ ! -s /etc/munge/munge.key ]]; then
        say "creating /etc/munge/munge.key"
        install -d -o munge -g munge -m 0700 /etc/munge
        dd if=/dev/urandom of=/etc/munge/munge.key bs=1024 count=1 status=none
        chown munge:munge /etc/munge/munge.key && chmod 0400 /etc/munge/munge.key
    fi
    install -d -o munge -g munge -m 0755 /run/munge
    install -d -o munge -g munge -m 0700 /var/lib/munge /var/log/munge
    setpriv --reuid munge --regid munge --init-groups /usr/sbin/munged --foreground \
        >"$CLUSTER/log/munged.out" 2>&1 &
    STARTED_PIDS+=($!)
    wait_for "munged" 20 bash -c 'munge -n | unmunge >/dev/null 2>&1'
}

start_slurm() {
    /usr/sbin/slurmctld -D -f "$CONF" >"$CLUSTER/log/slurmctld.out" 2>&1 &
    STARTED_PIDS+=($!)
    wait_for "slurmctld" 30 scontrol ping
    /usr/sbin/slurmd -D -f "$CONF" >"$CLUSTER/log/slurmd.out" 2>&1 &
    STARTED_PIDS+=($!)
    wait_for "node idle" 60 bash -c '[[ "$(sinfo -h -N -o %T | head -n 1)" == idle ]]'
    say "cluster up: $(sinfo -h -N -o '%N %T %c CPUs %m MB partition %P')"
}

wait_for() {  # wait_for WHAT SECONDS COMMAND...: poll COMMAND once a second until it succeeds
    local what="$1" seconds="$2"
    shift 2
    for ((i = 0; i < seconds; i++)); do
        "$@" >/dev/null 2>&1 && return 0
        sleep 1
    done
    die "$what not ready after ${seconds}s (logs in $CLUSTER/log)"
}

start_squeue_poll() {  # every job this cluster sees: id|name|comment|state, every 2 s, until stopped
    (while true; do
        squeue --states=all --noheader --format='%i|%j|%k|%T' 2>/dev/null || true
        sleep 2
    done) >"$CLUSTER/log/squeue_poll.txt" &
    STARTED_PIDS+=($!)
}

stop_started() {
    local status=$?
    trap - EXIT INT TERM
    if scontrol ping >/dev/null 2>&1; then
        # jobs of a failed or interrupted run would outlive slurmd in their slurmstepd: cancel them first
        # (this cluster is private to the script, so every job on it is ours)
        local jobs
        jobs="$(squeue -h -t pending,running,completing -o %i 2>/dev/null | tr '\n' ' ')"
        if [[ -n "${jobs// /}" ]]; then
            say "cancelling unfinished jobs: $jobs"
            # shellcheck disable=SC2086
            scancel $jobs || true
            for ((i = 0; i < 30; i++)); do
                [[ -z "$(squeue -h -t pending,running,completing -o %i 2>/dev/null)" ]] && break
                sleep 1
            done
        fi
    fi
    for ((k = ${#STARTED_PIDS[@]} - 1; k >= 0; k--)); do
        local pid="${STARTED_PIDS[k]}"
        if kill -0 "$pid" 2>/dev/null; then
            kill -TERM "$pid" 2>/dev/null || true
            for ((i = 0; i < 20; i++)); do kill -0 "$pid" 2>/dev/null || break; sleep 0.5; done
            kill -0 "$pid" 2>/dev/null && kill -KILL "$pid" 2>/dev/null || true
        fi
    done
    ((${#STARTED_PIDS[@]})) && say "stopped the ${#STARTED_PIDS[@]} processes this script started (${STARTED_PIDS[*]})"
    if [[ ! -e "$CONF" ]] || grep -qxF "$MARKER" "$CONF"; then  # ours, or none: remove, put an earlier one back
        rm -f "$CONF"
        if [[ -e "$CONF_BACKUP" ]]; then
            mv "$CONF_BACKUP" "$CONF" && say "put the earlier $CONF back"
        fi
    fi
    exit "$status"
}

# ------------------------------------------------------------------------------------------------- the runs
run_local() {
    if [[ "${REUSE_LOCAL:-0}" == 1 && -f "$WORK/local/report/summary.json" ]]; then
        say "REUSE_LOCAL=1: keeping the local run in $WORK/local"
        return
    fi
    say "local run: regimewise demo --out $WORK/local --cores 2"
    rm -rf "$WORK/local"
    local t0=$SECONDS
    regimewise demo --out "$WORK/local" --cores 2
    say "local run finished in $((SECONDS - t0)) s"
}

write_test_profile() {  # the repository's SLURM profile plus three settings for this test cluster only
    # No accounting here, so job states come from squeue (README: "Sites without job accounting"); logs of
    # successful jobs are kept (they record which SLURM job ran which workflow job); first status check after 10 s.
    mkdir -p "$CLUSTER/profile"
    python - "$PROFILE/profile.yaml" "$CLUSTER/profile/profile.yaml" <<'EOF'
import sys, yaml
profile = yaml.safe_load(open(sys.argv[1]))
profile.update({"slurm-status-command": "squeue", "slurm-keep-successful-logs": True,
                "slurm-init-seconds-before-status-checks": 10})
open(sys.argv[2], "w").write(yaml.safe_dump(profile, sort_keys=False))
EOF
}

run_slurm() {
    # What a user runs: `regimewise demo` with --profile (pipeline/regimewise/cli.py passes it to Snakemake), so
    # the run records the same command as the local one.
    local out="$WORK/slurm"
    rm -rf "$out"
    write_test_profile
    say "SLURM run: regimewise demo --out $out --profile $CLUSTER/profile (config/profiles/slurm + squeue status)"
    local t0=$SECONDS
    if ! regimewise demo --out "$out" --profile "$CLUSTER/profile"; then
        tail -n 40 "$out/logs/workflow.log" >&2
        die "the SLURM run failed; see $out/logs/workflow.log and $CLUSTER/log"
    fi
    say "SLURM run finished in $((SECONDS - t0)) s"
}

main() {
    preflight
    install_packages
    trap stop_started EXIT INT TERM
    write_slurm_conf
    start_munge
    start_slurm
    run_local
    start_squeue_poll
    run_slurm
    sleep 3  # one more squeue poll after the last job
    python "$REPO/bench/cluster/compare_runs.py" --local "$WORK/local" --slurm "$WORK/slurm" \
        --jobcomp "$CLUSTER/log/jobcomp.txt" --squeue-log "$CLUSTER/log/squeue_poll.txt"
}

main "$@"
