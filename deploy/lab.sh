#!/usr/bin/env bash
# A multi-host Baton lab on one Linux machine: every host is a network
# namespace, joined by veth pairs to a bridge that lives in a namespace of
# its own. Three NATS servers (clustered, JetStream on, permissions from
# `sim creds`), the coordinator, one agentd per robot, and the driver
# (`sim drive`), which plays the simulated world through every robot's
# local interface over the lab network with a bearer token.
#
#   sudo bash deploy/lab.sh --robots 4 --rounds 60 --kill-nats-at 30
#
# It exits 0 only when every round completed for every live robot (sim
# drive's verdict). With --kill-nats-at R it SIGKILLs the NATS server the
# coordinator is connected to when the driver reaches round R, and prints
# what that cost: the rounds in which robots held, and the time from the
# kill until rounds were full again.
#
# Needs root, iproute2 (ip netns, tc), curl and Go. Touches nothing of the
# root namespace's network: addresses, routes and the bridge exist only in
# namespaces this script creates (baton-lab-<id>-*), and a trap removes
# them, every process and the temp dir on exit, error or Ctrl-C.
set -euo pipefail

usage() {
	cat <<'EOF'
usage: sudo bash deploy/lab.sh [flags]

  --robots N             robots, each agentd in its own namespace (default 4)
  --rounds N             rounds the coordinator runs and the driver plays (default 60)
  --kill-nats-at R       SIGKILL a NATS server (--kill-target) once the driver has played round R-1
  --kill-target T        which server: coordinator (the one it is connected to; default),
                         log-leader (the decision log's stream leader), nats-a, nats-b or nats-c
  --kill-offset S        seconds after round R-1 ended to wait before the kill (default 0)
  --rate-limit R=RATE    shape robot R's link both ways with tbf (e.g. 1=256kbit; repeatable)
  --scenario NAME        harbor or upkeep (default harbor)
  --seed S               run seed: the world and decisions of `sim fleet --seed S` (default 1)
  --turn-deadline D      the coordinator's per-turn deadline (default 200ms, the coordinator's own)
  --period D             the coordinator's --period: a round starts at most this often (default 250ms)
  --wait D               how long the driver waits for a round's decision (default 15s)
  --keep                 keep the logs directory after a successful run
  --fail-at STAGE        fail on purpose after STAGE (network, nats, fleet, drive): tests teardown
  -h, --help             this text

Logs of every process go to a directory printed at the start (kept on failure).
EOF
}

ROBOTS=4
ROUNDS=60
KILL_AT=0
RATES=()
SCENARIO=harbor
SEED=1
TURN_DEADLINE=200ms
PERIOD=250ms
KILL_OFFSET=0
KILL_TARGET=coordinator
WAIT=15s
KEEP=0
FAIL_AT=""
FLEET=lab

die() {
	echo "lab: $*" >&2
	exit 1
}

while [ $# -gt 0 ]; do
	case "$1" in
	--robots) ROBOTS=${2:?--robots needs a number}; shift 2 ;;
	--rounds) ROUNDS=${2:?--rounds needs a number}; shift 2 ;;
	--kill-nats-at) KILL_AT=${2:?--kill-nats-at needs a round}; shift 2 ;;
	--rate-limit) RATES+=("${2:?--rate-limit needs ROBOT=RATE}"); shift 2 ;;
	--scenario) SCENARIO=${2:?--scenario needs a name}; shift 2 ;;
	--seed) SEED=${2:?--seed needs a number}; shift 2 ;;
	--turn-deadline) TURN_DEADLINE=${2:?--turn-deadline needs a duration}; shift 2 ;;
	--kill-target) KILL_TARGET=${2:?--kill-target needs a server}; shift 2 ;;
	--kill-offset) KILL_OFFSET=${2:?--kill-offset needs seconds}; shift 2 ;;
	--period) PERIOD=${2:?--period needs a duration}; shift 2 ;;
	--wait) WAIT=${2:?--wait needs a duration}; shift 2 ;;
	--keep) KEEP=1; shift ;;
	--fail-at) FAIL_AT=${2:?--fail-at needs a stage}; shift 2 ;;
	-h | --help) usage; exit 0 ;;
	*) usage >&2; die "unknown argument $1" ;;
	esac
done

isnum() { [[ $1 =~ ^[0-9]+$ ]]; }
if ! isnum "$ROBOTS" || [ "$ROBOTS" -lt 1 ] || [ "$ROBOTS" -gt 100 ]; then die "--robots $ROBOTS: want 1..100"; fi
if ! isnum "$ROUNDS" || [ "$ROUNDS" -lt 1 ]; then die "--rounds $ROUNDS: want at least 1"; fi
if ! isnum "$KILL_AT" || [ "$KILL_AT" -gt "$ROUNDS" ]; then die "--kill-nats-at $KILL_AT: want a round in 1..$ROUNDS"; fi
isnum "$SEED" || die "--seed $SEED: want a number"
[[ $KILL_OFFSET =~ ^[0-9]+(\.[0-9]+)?$ ]] || die "--kill-offset $KILL_OFFSET: want seconds, e.g. 0.25"
case "$KILL_TARGET" in coordinator | log-leader | nats-[abc]) ;; *) die "--kill-target $KILL_TARGET: want coordinator, log-leader, nats-a, nats-b or nats-c" ;; esac
case "$FAIL_AT" in "" | network | nats | fleet | drive) ;; *) die "--fail-at $FAIL_AT: want network, nats, fleet or drive" ;; esac
# A round can last every turn's deadline, plus a stall of the decision
# log (about 2 s while its stream elects a leader): the driver must wait
# longer than that before it calls a robot's round lost.
to_ms() { # 250ms, 1s, 1.5s -> milliseconds ("" when it cannot tell)
	if [[ $1 =~ ^([0-9]+)ms$ ]]; then echo "${BASH_REMATCH[1]}"
	elif [[ $1 =~ ^([0-9]+)(\.([0-9]{1,3}))?s$ ]]; then
		local frac=${BASH_REMATCH[3]:-0}
		while [ ${#frac} -lt 3 ]; do frac="${frac}0"; done
		echo $((BASH_REMATCH[1] * 1000 + 10#$frac))
	fi
}
td_ms=$(to_ms "$TURN_DEADLINE")
wait_ms=$(to_ms "$WAIT")
if [ -n "$td_ms" ] && [ -n "$wait_ms" ] && [ $((ROBOTS * td_ms + 5000)) -gt "$wait_ms" ]; then
	echo "lab: WARNING: --wait $WAIT is short for $ROBOTS turns of $TURN_DEADLINE plus a 5 s stall; robots may be called held in slow rounds" >&2
fi
declare -A RATE_OF=()
for spec in "${RATES[@]}"; do
	r=${spec%%=*}
	rate=${spec#*=}
	if ! isnum "$r" || [ "$r" -ge "$ROBOTS" ]; then die "--rate-limit $spec: robot $r is not one of 0..$((ROBOTS - 1))"; fi
	[[ $rate =~ ^[0-9]+(\.[0-9]+)?([kmgt]?bit|[kmgt]?bps)$ ]] || die "--rate-limit $spec: want a tc rate like 256kbit or 1mbit"
	RATE_OF[$r]=$rate
done

[ "$(id -u)" = 0 ] || die "needs root (network namespaces)"
ip netns list >/dev/null 2>&1 || die "ip netns does not work here"
for tool in ip tc curl timeout; do
	command -v "$tool" >/dev/null || die "$tool is not installed"
done
export PATH="$PATH:/usr/local/go/bin"
command -v go >/dev/null || die "Go is not installed (expected in PATH or /usr/local/go/bin)"
REPO=$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)

ID=$$
NS="baton-lab-$ID"
WORK=$(mktemp -d "/tmp/baton-lab-$ID-work.XXXXXX")
LOGS=$(mktemp -d "/tmp/baton-lab-$ID-logs.XXXXXX")
BIN="$WORK/bin"
PIDS=()     # every process this script started, by pid
NSES=()     # every namespace this script created
declare -A NATS_PID=()

# shellcheck disable=SC2317 # run by the trap
cleanup() {
	local rc=$? pid ns
	trap - EXIT INT TERM
	set +e
	# The driver first, so that it does not play on against dying robots.
	for pid in $(ip netns pids "$NS-driver" 2>/dev/null); do kill -TERM "$pid" 2>/dev/null; done
	for pid in "${PIDS[@]}"; do kill -TERM "$pid" 2>/dev/null; done
	for _ in $(seq 50); do # up to 5 s for a clean stop
		local alive=0
		for pid in "${PIDS[@]}"; do kill -0 "$pid" 2>/dev/null && alive=1; done
		[ "$alive" = 0 ] && break
		sleep 0.1
	done
	for pid in "${PIDS[@]}"; do kill -KILL "$pid" 2>/dev/null; done
	# Anything else left inside the lab's namespaces (a child of a daemon).
	for ns in "${NSES[@]}"; do
		for pid in $(ip netns pids "$ns" 2>/dev/null); do kill -KILL "$pid" 2>/dev/null; done
	done
	for ns in "${NSES[@]}"; do ip netns del "$ns" 2>/dev/null; done
	rm -rf "$WORK"
	if [ "$rc" = 0 ] && [ "$KEEP" = 0 ]; then
		rm -rf "$LOGS"
	else
		echo "lab: logs kept in $LOGS" >&2
	fi
	echo "lab: torn down (namespaces $NS-*, ${#PIDS[@]} processes, $WORK)" >&2
	exit "$rc"
}
trap cleanup EXIT
trap 'echo "lab: interrupted" >&2; exit 130' INT TERM

fail_at() {
	if [ "$FAIL_AT" = "$1" ]; then
		die "failing on purpose after stage $1 (--fail-at)"
	fi
}

# Labs whose script died without its trap (SIGKILL) leave namespaces
# behind; remove those of dead scripts (the id is the script's pid).
for stale in $(ip netns list | awk '{print $1}' | grep -E '^baton-lab-[0-9]+-' || true); do
	sid=${stale#baton-lab-}
	sid=${sid%%-*}
	if ! kill -0 "$sid" 2>/dev/null; then
		for pid in $(ip netns pids "$stale" 2>/dev/null); do kill -KILL "$pid" 2>/dev/null || true; done
		ip netns del "$stale" 2>/dev/null || true
		echo "lab: removed $stale, left by an earlier lab" >&2
	fi
done

KILL_NOTE=""
[ "$KILL_AT" -gt 0 ] && KILL_NOTE=", NATS server killed at round $KILL_AT"
echo "lab $ID: $ROBOTS robots, $ROUNDS rounds$KILL_NOTE; namespaces $NS-*; logs in $LOGS"

# --- binaries --------------------------------------------------------------
mkdir -p "$BIN"
(cd "$REPO" && go build -o "$BIN/" ./agentd ./coordinator ./sim) >"$LOGS/build.log" 2>&1 ||
	{ cat "$LOGS/build.log" >&2; die "building the daemons failed"; }
(cd "$REPO" && go build -o "$BIN/nats-server" github.com/nats-io/nats-server/v2) >>"$LOGS/build.log" 2>&1 ||
	{ cat "$LOGS/build.log" >&2; die "building nats-server failed"; }

# --- network ---------------------------------------------------------------
# 10.77.0.0/24 exists only inside the lab's namespaces.
SUBNET=10.77.0
declare -A IP=([nats-a]=$SUBNET.11 [nats-b]=$SUBNET.12 [nats-c]=$SUBNET.13 [coord]=$SUBNET.20 [driver]=$SUBNET.30)
for r in $(seq 0 $((ROBOTS - 1))); do IP[robot-$r]=$SUBNET.$((100 + r)); done
SW="$NS-sw"

ip netns add "$SW"
NSES+=("$SW")
ip -n "$SW" link set lo up
ip -n "$SW" link add br0 type bridge
ip -n "$SW" link set br0 up

# host NAME: a namespace with eth0 on the bridge (port p-NAME in the
# switch's namespace). Both ends are made inside lab namespaces.
host() {
	local name=$1 port="p-${1/robot-/r}"
	ip netns add "$NS-$name"
	NSES+=("$NS-$name")
	ip -n "$NS-$name" link set lo up
	ip -n "$SW" link add "$port" type veth peer name eth0 netns "$NS-$name"
	ip -n "$SW" link set "$port" master br0 up
	ip -n "$NS-$name" addr add "${IP[$name]}/24" dev eth0
	ip -n "$NS-$name" link set eth0 up
}
for h in nats-a nats-b nats-c coord driver; do host "$h"; done
for r in $(seq 0 $((ROBOTS - 1))); do host "robot-$r"; done

# tbf shapes egress only: once on the robot's eth0 (its uplink), once on
# its bridge port (its downlink). The bucket holds a few packets (16 kB);
# the queue waits at most 400 ms before dropping, about a radio modem's.
for r in "${!RATE_OF[@]}"; do
	ip netns exec "$NS-robot-$r" tc qdisc add dev eth0 root tbf rate "${RATE_OF[$r]}" burst 16kb latency 400ms
	ip netns exec "$SW" tc qdisc add dev "p-r$r" root tbf rate "${RATE_OF[$r]}" burst 16kb latency 400ms
	echo "lab: robot $r's link shaped to ${RATE_OF[$r]} both ways (tbf, burst 16kb, latency 400ms)"
done
fail_at network

# start NAME LOG CMD...: run CMD in namespace NAME, output to LOG.
start() {
	local name=$1 log=$2
	shift 2
	ip netns exec "$NS-$name" "$@" >"$LOGS/$log.log" 2>&1 &
	LAST_PID=$!
	PIDS+=("$LAST_PID")
	disown "$LAST_PID" # killed on purpose or by the trap: no job reports
}

# wait_for WHAT SECONDS CMD...: retry CMD every 0.2 s until it succeeds.
wait_for() {
	local what=$1 limit=$2
	shift 2
	for _ in $(seq $((limit * 5))); do
		"$@" >/dev/null 2>&1 && return 0
		sleep 0.2
	done
	die "$what not ready after ${limit}s (logs in $LOGS)"
}

# --- fleet identities ------------------------------------------------------
"$BIN/sim" creds --fleet "$FLEET" --robots "$ROBOTS" --out "$WORK/creds" >/dev/null
head -c 24 /dev/urandom | base64 >"$WORK/http.token"
head -c 32 /dev/urandom | base64 >"$WORK/gossip.key"
chmod 600 "$WORK/http.token" "$WORK/gossip.key"

# --- NATS: deploy/nats/node-*.conf with the lab's addresses -----------------
for x in a b c; do
	dir="$WORK/nats-$x"
	mkdir -p "$dir/js"
	cp "$WORK/creds/authorization.conf" "$dir/"
	# Listen on the lab address; routes by address (the lab has no DNS);
	# JetStream files in the temp dir.
	sed -E -e "s/0\.0\.0\.0:/${IP[nats-$x]}:/g" \
		-e "s#://nats-a:#://${IP[nats-a]}:#g; s#://nats-b:#://${IP[nats-b]}:#g; s#://nats-c:#://${IP[nats-c]}:#g" \
		-e "s#^([[:space:]]*store_dir:).*#\1 \"$dir/js\"#" \
		"$REPO/deploy/nats/node-$x.conf" >"$dir/nats.conf"
	! grep -Eq '://nats-[abc]:|/var/lib/nats' "$dir/nats.conf" || die "deploy/nats/node-$x.conf: a host name or path the lab cannot rewrite"
	"$BIN/nats-server" -t -c "$dir/nats.conf" >>"$LOGS/nats-$x.log" 2>&1 || die "$dir/nats.conf does not load (see $LOGS/nats-$x.log)"
done
for x in a b c; do
	start "nats-$x" "nats-$x" "$BIN/nats-server" -c "$WORK/nats-$x/nats.conf"
	NATS_PID[nats-$x]=$LAST_PID
done
# Serving, and JetStream's meta group has a leader every server knows (a
# coordinator that creates its log stream earlier can time out).
# shellcheck disable=SC2317 # run by wait_for
meta_leader() {
	ip netns exec "$NS-$1" curl -sf --max-time 2 http://127.0.0.1:8222/healthz >/dev/null &&
		ip netns exec "$NS-$1" curl -s --max-time 2 http://127.0.0.1:8222/jsz |
		sed -n '/"meta_cluster"/,/"replicas"/p' | grep -Eq '"leader": ?"nats-[abc]"'
}
for x in a b c; do
	wait_for "nats-$x" 30 meta_leader "nats-$x"
done
NATS_URLS="nats://${IP[nats-a]}:4222,nats://${IP[nats-b]}:4222,nats://${IP[nats-c]}:4222"
echo "lab: NATS cluster up ($NATS_URLS)"
fail_at nats

# --- coordinator and robots ------------------------------------------------
COMMON=(--fleet "$FLEET" --scenario "$SCENARIO" --robots "$ROBOTS" --gossip-key-file "$WORK/gossip.key")
COORD_SEED=$("$BIN/sim" drive --seed "$SEED" --print-coordinator-seed)
COORD_FLAGS=(--nats "$NATS_URLS" --creds "$WORK/creds/coordinator.nk" "${COMMON[@]}"
	--rounds "$ROUNDS" --seed "$COORD_SEED" --turn-deadline "$TURN_DEADLINE" --period "$PERIOD"
	--decision-log "$LOGS/decisions.jsonl" --http 127.0.0.1:7480 --gossip "${IP[coord]}:7946"
	--log-replicas 3) # the durable decision log on all three servers: losing one loses no round
start coord coordinator "$BIN/coordinator" "${COORD_FLAGS[@]}"
wait_for coordinator 30 ip netns exec "$NS-coord" curl -sf http://127.0.0.1:7480/healthz

ROBOT_HTTP=()
for r in $(seq 0 $((ROBOTS - 1))); do
	start "robot-$r" "agentd-$r" "$BIN/agentd" --robot "$r" --nats "$NATS_URLS" --creds "$WORK/creds/robot-$r.nk" "${COMMON[@]}" \
		--http "${IP[robot-$r]}:7400" --http-token-file "$WORK/http.token" \
		--gossip "${IP[robot-$r]}:7946" --join "${IP[coord]}:7946"
	ROBOT_HTTP+=("http://${IP[robot-$r]}:7400")
done
for r in $(seq 0 $((ROBOTS - 1))); do
	# From the driver's namespace: the robot serves, across the lab network.
	wait_for "agentd $r" 30 ip netns exec "$NS-driver" curl -sf "http://${IP[robot-$r]}:7400/healthz"
done
# shellcheck disable=SC2317 # run by wait_for
alive() { ip netns exec "$NS-coord" curl -sf http://127.0.0.1:7480/healthz | grep -q ", $ROBOTS robots alive"; }
wait_for "the coordinator's view of $ROBOTS robots" 30 alive
echo "lab: coordinator and $ROBOTS robots up; coordinator --seed $COORD_SEED"
fail_at fleet

# which_nats: the NATS server the coordinator is connected to now (its
# client name is coordinator-<fleet>), by each server's monitoring port.
which_nats() {
	local x
	for x in a b c; do
		if ip netns exec "$NS-nats-$x" curl -s --max-time 2 'http://127.0.0.1:8222/connz?limit=4096' 2>/dev/null |
			grep -Eq "\"name\": ?\"coordinator-$FLEET\""; then
			echo "nats-$x"
			return
		fi
	done
	echo "none"
}

# log_leader: the server leading the decision log's stream (its raft
# group's leader), as the first server that answers sees it.
log_leader() {
	local x leader
	for x in a b c; do
		leader=$(ip netns exec "$NS-nats-$x" curl -s --max-time 2 'http://127.0.0.1:8222/jsz?accounts=true&streams=true' 2>/dev/null |
			sed -n '/"stream_detail"/,$p' | grep -m1 '"leader"' | sed -E 's/.*"leader": ?"([^"]*)".*/\1/')
		if [ -n "$leader" ]; then
			echo "$leader"
			return
		fi
	done
	echo "none"
}

# kill_nats: SIGKILL the target server; record when, which, and what it was.
kill_nats() {
	local coord leader target
	coord=$(which_nats)
	leader=$(log_leader)
	case "$KILL_TARGET" in
	coordinator) target=$coord ;;
	log-leader) target=$leader ;;
	*) target=$KILL_TARGET ;;
	esac
	[ -n "${NATS_PID[$target]:-}" ] || target=nats-a
	sleep "$KILL_OFFSET"
	kill -KILL "${NATS_PID[$target]}"
	echo "$EPOCHREALTIME $target $coord $leader" >"$KILLFILE"
	echo "lab: SIGKILLed $target as round $KILL_AT began (coordinator on $coord, decision log led by $leader)"
}

# --- the driver ------------------------------------------------------------
# Each line of the driver is stamped with the time it arrived (rounds end
# when their line comes); the kill happens once the driver has played
# round KILL_AT-1, so round KILL_AT is the next to start. The pipeline runs
# in the background so that Ctrl-C or a TERM reaches the trap at once.
KILLFILE="$WORK/killed"
DRIVE_LIMIT=$((120 + ROUNDS * 20))
(
	set +e
	ip netns exec "$NS-driver" timeout --kill-after=5 "$DRIVE_LIMIT" "$BIN/sim" drive --scenario "$SCENARIO" --robots "$ROBOTS" \
		--robot-http "$(IFS=,; echo "${ROBOT_HTTP[*]}")" --http-token-file "$WORK/http.token" \
		--rounds "$ROUNDS" --seed "$SEED" --wait "$WAIT" 2>"$LOGS/drive.err" |
		{
			while IFS= read -r line; do
				printf '%s %s\n' "$EPOCHREALTIME" "$line" >>"$LOGS/drive.log"
				printf '%s\n' "$line"
				if [ "$KILL_AT" -gt 0 ] && [ ! -e "$KILLFILE" ]; then
					if { [ "$KILL_AT" = 1 ] && [[ $line == drive* ]]; } || [[ $line =~ ^round\ +$((KILL_AT - 1))/ ]]; then
						: >"$KILLFILE"
						kill_nats & # the loop goes on stamping lines
					fi
				fi
			done
			wait
		}
	echo "${PIPESTATUS[0]}" >"$WORK/drive.rc"
) &
DRIVER_JOB=$!
PIDS+=("$DRIVER_JOB")
wait "$DRIVER_JOB" || true
DRIVE_RC=$(cat "$WORK/drive.rc" 2>/dev/null || echo 1)
cat "$LOGS/drive.err" >&2
[ "$DRIVE_RC" = 124 ] && echo "lab: the driver did not finish within ${DRIVE_LIMIT}s" >&2
fail_at drive

# --- failover figures ------------------------------------------------------
# Affected: a round that ended after the kill with a robot held. Full
# again: the end of the first round, ending after the kill, from which on
# every round was full.
if [ "$KILL_AT" -gt 0 ]; then
	if [ ! -s "$KILLFILE" ]; then
		echo "lab: the driver never reached round $KILL_AT: no NATS server was killed" >&2
		DRIVE_RC=1
	else
		read -r KILL_TS KILLED COORD_ON LEADER <"$KILLFILE"
		echo
		awk -v kill="$KILL_TS" -v at="$KILL_AT" -v who="$KILLED" -v coord="$COORD_ON" -v leader="$LEADER" '
		$2 == "round" && $3 ~ /^[0-9]+\/[0-9]+$/ {
			split($3, rr, "/"); r = rr[1] + 0
			for (i = 4; i < NF; i++) {
				if ($i == "latency") lat[r] = $(i + 1)
				if ($i == "held") held[r] = $(i + 1)
				if ($i == "guessed") gsd[r] = $(i + 1)
				if ($i == "robots") robots[r] = $(i + 1)
			}
			ts[r] = $1; last = r
		}
		END {
			role = ""
			if (who == coord) role = "the coordinator'"'"'s server"
			if (who == leader) role = role (role == "" ? "" : " and ") "the decision log'"'"'s stream leader"
			if (role == "") role = "neither the coordinator'"'"'s server nor the log'"'"'s leader"
			if (at > 1 && (at - 1) in ts)
				printf "failover: %s SIGKILLed %.3f s after round %d ended (%s)\n", who, kill - ts[at - 1], at - 1, role
			else
				printf "failover: %s SIGKILLed before round 1 ended (%s)\n", who, role
			first = 0; affected = 0; held_sum = 0; lastbad = 0; gap = 0; n = 0
			for (r = 1; r <= last; r++) {
				if (ts[r] <= kill) { if (r > 1) gaps[++n] = ts[r] - ts[r - 1]; continue }
				if (first == 0) first = r
				if (r > 1 && ts[r] - ts[r - 1] > gap) gap = ts[r] - ts[r - 1]
				if (held[r] > 0) { affected++; held_sum += held[r]; lastbad = r }
			}
			if (first == 0) { printf "no round ended after the kill\n"; exit }
			full = (lastbad == 0) ? first : lastbad + 1
			hi = full + 2; if (hi > last) hi = last
			printf "%6s %14s %11s %8s %5s  %s\n", "round", "ended after", "latency ms", "guessed", "held", "robots held"
			for (r = (first > 1 ? first - 1 : first); r <= hi; r++)
				printf "%6d %13.3fs %11.2f %8d %5d  %s\n", r, ts[r] - kill, lat[r], gsd[r], held[r], (held[r] > 0 ? robots[r] : "-")
			printf "rounds affected (a robot held): %d; robot-rounds held: %d\n", affected, held_sum
			if (full > last)
				printf "rounds full again: not before the run ended (round %d)\n", last
			else
				printf "rounds full again: %.3f s after the kill (round %d)\n", ts[full] - kill, full
			# The usual time between round ends before the kill (median).
			for (i = 1; i <= n; i++) for (j = i + 1; j <= n; j++) if (gaps[j] < gaps[i]) { x = gaps[i]; gaps[i] = gaps[j]; gaps[j] = x }
			if (n > 0) printf "longest time between two round ends after the kill: %.3f s (before it: %.3f s, median)\n", gap, gaps[int((n + 1) / 2)]
		}' "$LOGS/drive.log" | tee "$LOGS/failover.txt"
	fi
fi
# The durable decision log, read back from the surviving servers: every
# round 1..ROUNDS once, none lost to the kill.
if ip netns exec "$NS-coord" timeout 60 "$BIN/sim" replay --nats "$NATS_URLS" --creds "$WORK/creds/coordinator.nk" \
	--fleet "$FLEET" --scenario "$SCENARIO" --robots "$ROBOTS" --export "$LOGS/decisions-stream.jsonl" \
	>"$LOGS/replay.txt" 2>&1 && grep -q "rounds 1-$ROUNDS in " "$LOGS/replay.txt"; then
	echo "lab: durable decision log: $(grep -m1 '^rounds ' "$LOGS/replay.txt")"
else
	echo "lab: the durable decision log does not hold rounds 1-$ROUNDS once each:" >&2
	cat "$LOGS/replay.txt" >&2
	DRIVE_RC=1
fi
# The same seed on one machine, in virtual time: equal digests mean the lab
# decided exactly what sim fleet decides (guesses and holds change them).
LAB_DIGEST=$(awk '$2 == "decisions" && $3 == "sha256" {print $4}' "$LOGS/drive.log")
REF_DIGEST=$("$BIN/sim" fleet --virtual --quiet --scenario "$SCENARIO" --robots "$ROBOTS" --rounds "$ROUNDS" --seed "$SEED" 2>/dev/null |
	awk '$1 == "decisions" && $2 == "sha256" {print $3}') || true
if [ -n "$LAB_DIGEST" ] && [ "$LAB_DIGEST" = "$REF_DIGEST" ]; then
	echo "lab: decisions are exactly sim fleet --seed $SEED's (sha256 $LAB_DIGEST)"
elif [ -n "$LAB_DIGEST" ]; then
	echo "lab: decisions differ from sim fleet --seed $SEED's (guessed turns or holds change them)"
fi
if [ "$DRIVE_RC" = 0 ]; then
	echo "lab: every round completed for every live robot"
else
	echo "lab: FAILED (sim drive exit $DRIVE_RC; logs in $LOGS)" >&2
fi
exit "$DRIVE_RC"
