"""Generated log corpora in nine real-world shapes, each line labelled with its true template.

The shapes follow how common kinds of programs write their messages (the part a format hands
to template mining: after the timestamp and level, the program name and pid kept where syslog
puts them). Hosts, users, ids and values are invented. ``corpus(shape, n, seed)`` gives
``(true template ids, messages)``; ``grouping_accuracy`` scores a mining against them.
"""

from __future__ import annotations

import random
import string
from collections import defaultdict
from collections.abc import Callable, Sequence

R = random.Random


def _ip(r: R) -> str:
    return f"{r.choice([10, 172, 192, 198])}.{r.randint(0, 255)}.{r.randint(0, 255)}.{r.randint(1, 254)}"


def _host(r: R) -> str:
    return (f"{r.choice(['cell', 'rack', 'edge', 'vault', 'relay', 'kiosk'])}-"
            f"{r.choice(['north', 'south', 'east', 'west', 'alpha', 'delta'])}.{r.choice(['lockers', 'depot'])}.internal")


def _port(r: R) -> int:
    return r.randint(1024, 65535)


def _word(r: R, lo: int = 4, hi: int = 9) -> str:
    return "".join(r.choices(string.ascii_lowercase, k=r.randint(lo, hi)))


def _user(r: R) -> str:
    return r.choice(["alice", "bob", "carol", "dave", "erin", "oper", "backup", "deploy", "guest", "test",
                     "admin", "pi", "ubuntu", "svc_sync", f"u{r.randint(100, 999)}"])


def _hex(r: R, n: int) -> str:
    return "".join(r.choices("0123456789abcdef", k=n))


def _pid(r: R) -> int:
    return r.randint(300, 65000)


def _path(r: R) -> str:
    return "/" + "/".join(_word(r, 3, 7) for _ in range(r.randint(1, 4)))


# each shape: template id -> (relative weight, message maker)
Maker = Callable[[R], str]


def _ssh(r: R) -> dict[str, tuple[int, Maker]]:
    sshd = lambda r: f"sshd[{_pid(r)}]:"
    return {
        "ssh-accept-pw": (8, lambda r: f"{sshd(r)} Accepted password for {_user(r)} from {_ip(r)} port {_port(r)} ssh2"),
        "ssh-accept-key": (8, lambda r: f"{sshd(r)} Accepted publickey for {_user(r)} from {_ip(r)} port {_port(r)} "
                                        f"ssh2: ED25519 SHA256:{_hex(r, 20)}"),
        "ssh-fail-invalid": (10, lambda r: f"{sshd(r)} Failed password for invalid user {_user(r)} from {_ip(r)} "
                                           f"port {_port(r)} ssh2"),
        "ssh-fail": (6, lambda r: f"{sshd(r)} Failed password for {_user(r)} from {_ip(r)} port {_port(r)} ssh2"),
        "ssh-invalid": (10, lambda r: f"{sshd(r)} Invalid user {_user(r)} from {_ip(r)} port {_port(r)}"),
        "ssh-open": (8, lambda r: f"{sshd(r)} pam_unix(sshd:session): session opened for user {_user(r)}"
                                  f"(uid={r.randint(0, 2000)}) by (uid=0)"),
        "ssh-close": (8, lambda r: f"{sshd(r)} pam_unix(sshd:session): session closed for user {_user(r)}"),
        "ssh-disc": (6, lambda r: f"{sshd(r)} Received disconnect from {_ip(r)} port {_port(r)}:11: disconnected by user"),
        "ssh-disc-user": (6, lambda r: f"{sshd(r)} Disconnected from user {_user(r)} {_ip(r)} port {_port(r)}"),
        "ssh-preauth": (5, lambda r: f"{sshd(r)} Connection closed by authenticating user {_user(r)} {_ip(r)} "
                                     f"port {_port(r)} [preauth]"),
        "ssh-maxauth": (2, lambda r: f"{sshd(r)} error: maximum authentication attempts exceeded for {_user(r)} "
                                     f"from {_ip(r)} port {_port(r)} ssh2 [preauth]"),
        "ssh-rdns": (3, lambda r: f"{sshd(r)} reverse mapping checking getaddrinfo for {_host(r)} [{_ip(r)}] failed."),
        "ssh-listen": (1, lambda r: f"{sshd(r)} Server listening on {_ip(r)} port 22."),
    }


def _web(r: R) -> dict[str, tuple[int, Maker]]:
    return {
        "web-found-child": (12, lambda r: f"jk2_init() Found child {_pid(r)} in scoreboard slot {r.randint(0, 15)}"),
        "web-worker-ok": (8, lambda r: "workerEnv.init() ok /etc/httpd/conf/workers2.properties"),
        "web-error-state": (8, lambda r: f"mod_jk child workerEnv in error state {r.randint(1, 9)}"),
        "web-dir-forbidden": (5, lambda r: f"[client {_ip(r)}] Directory index forbidden by rule: {_path(r)}/"),
        "web-no-file": (8, lambda r: f"[client {_ip(r)}] File does not exist: /var/www/html{_path(r)}"),
        "web-cant-find": (2, lambda r: f"jk2_init() Can't find child {_pid(r)} in scoreboard"),
        "web-access": (25, lambda r: f'{_ip(r)} - {r.choice(["-", _user(r)])} [02/Dec/2026:07:{r.randint(10, 59)}:'
                                     f'{r.randint(10, 59)} +0000] "{r.choice(["GET", "POST", "HEAD"])} {_path(r)} '
                                     f'HTTP/1.1" {r.choice([200, 304, 404])} {r.randint(0, 90000)} "-" '
                                     f'"probe/{r.randint(1, 9)}.{r.randint(0, 9)}"'),
        "web-resuming": (1, lambda r: "Server configured -- resuming normal operations"),
        "web-sigterm": (1, lambda r: "caught SIGTERM, shutting down"),
    }


def _jvm(r: R) -> dict[str, tuple[int, Maker]]:
    thread = lambda r: f"[{r.choice(['main', f'pool-{r.randint(1, 4)}-thread-{r.randint(1, 32)}', f'http-nio-8080-exec-{r.randint(1, 50)}'])}]"
    return {
        "jvm-start": (1, lambda r: f"{thread(r)} net.lockerhub.App: Started App in {r.uniform(2, 30):.3f} seconds "
                                   f"(JVM running for {r.uniform(3, 40):.3f})"),
        "jvm-req": (30, lambda r: f"{thread(r)} net.lockerhub.web.ReserveController: reserve ok parcel="
                                  f"PX{r.randint(10**7, 10**8)} locker=LK-{r.randint(1, 900)} took={r.randint(1, 900)}ms"),
        "jvm-pool": (10, lambda r: f"{thread(r)} net.lockerhub.db.ConnPool: pool-{r.randint(1, 3)} - "
                                   f"Pool stats (total={r.randint(5, 20)}, active={r.randint(0, 5)}, "
                                   f"idle={r.randint(0, 10)}, waiting={r.randint(0, 3)})"),
        "jvm-retry": (6, lambda r: f"{thread(r)} net.lockerhub.sync.Uplink: retry {r.randint(1, 5)}/5 to "
                                   f"{_host(r)}:{_port(r)} after {r.randint(100, 900)} ms"),
        "jvm-npe": (2, lambda r: f"{thread(r)} net.lockerhub.sync.Uplink: java.lang.NullPointerException: "
                                 f"Cannot invoke \"Parcel.getId()\" because \"p\" is null"),
        "jvm-gc": (5, lambda r: f"{thread(r)} net.lockerhub.Health: heap used={r.randint(100, 900)}MB "
                                f"max={r.choice([1024, 2048])}MB gc.count={r.randint(1, 999)}"),
        "jvm-cache": (8, lambda r: f"{thread(r)} net.lockerhub.cache.Sizes: evicted {r.randint(1, 400)} entries from "
                                   f"cache {r.choice(['lockers', 'parcels', 'couriers'])}"),
        "jvm-batch": (5, lambda r: f"{thread(r)} net.lockerhub.sync.Batch: sent batch of parcels "
                                   + ",".join(f"PX{r.randint(10**7, 10**8)}" for _ in range(r.randint(1, 6)))),
    }


def _kernel(r: R) -> dict[str, tuple[int, Maker]]:
    dev = lambda r: r.choice(["sda", "sdb", "nvme0n1", "vda"])
    iface = lambda r: r.choice(["eth0", "eth1", "ens3", "enp0s31f6"])
    return {
        "k-oom": (2, lambda r: f"Out of memory: Killed process {_pid(r)} ({r.choice(['java', 'postgres', 'python3'])}) "
                               f"total-vm:{r.randint(10**5, 10**7)}kB, anon-rss:{r.randint(10**4, 10**6)}kB, "
                               f"file-rss:{r.randint(0, 9999)}kB, shmem-rss:0kB, UID:{r.randint(0, 2000)} "
                               f"pgtables:{r.randint(100, 9999)}kB oom_score_adj:0"),
        "k-link-up": (6, lambda r: f"netdrv: {iface(r)} NIC Link is Up 1000 Mbps Full Duplex, Flow Control: Rx/Tx"),
        "k-link-down": (6, lambda r: f"netdrv: {iface(r)} NIC Link is Down"),
        "k-ioerr": (5, lambda r: f"blk_update_request: I/O error, dev {dev(r)}, sector {r.randint(10**4, 10**9)} "
                                 f"op 0x0:(READ) flags 0x0 phys_seg 1 prio class 0"),
        "k-ext4": (5, lambda r: f"EXT4-fs ({dev(r)}{r.randint(1, 4)}): mounted filesystem with ordered data mode. "
                                f"Quota mode: none."),
        "k-segv": (8, lambda r: f"{_word(r)}[{_pid(r)}]: segfault at {_hex(r, 12)} ip {_hex(r, 16)} sp {_hex(r, 16)} "
                                f"error 4 in libc.so.6[{_hex(r, 12)}+{_hex(r, 6)}]"),
        "k-fw": (20, lambda r: f"[FW BLOCK] IN={iface(r)} OUT= MAC={_hex(r, 2)}:{_hex(r, 2)}:{_hex(r, 2)}:"
                                f"{_hex(r, 2)}:{_hex(r, 2)}:{_hex(r, 2)} SRC={_ip(r)} DST={_ip(r)} LEN={r.randint(40, 1500)} "
                                f"TOS=0x00 PREC=0x00 TTL={r.randint(30, 128)} ID={r.randint(1, 65535)} "
                                f"PROTO={r.choice(['TCP', 'UDP'])} SPT={_port(r)} DPT={r.choice([22, 80, 443])}"),
        "k-usb": (3, lambda r: f"usb {r.randint(1, 4)}-{r.randint(1, 9)}: new high-speed USB device number "
                               f"{r.randint(2, 40)} using xhci_hcd"),
        "k-cpu-throttle": (3, lambda r: f"CPU{r.randint(0, 15)}: Core temperature above threshold, cpu clock throttled "
                                        f"(total events = {r.randint(1, 9999)})"),
    }


def _proxy(r: R) -> dict[str, tuple[int, Maker]]:
    front = lambda r: r.choice(["fe_https", "fe_http"])
    back = lambda r: f"{r.choice(['be_api', 'be_static'])}/{r.choice(['srv1', 'srv2', 'srv3'])}"
    return {
        "px-http": (40, lambda r: f"gatewayd[{_pid(r)}]: {_ip(r)}:{_port(r)} {front(r)} {back(r)} "
                                  f"{r.randint(0, 50)}/{r.randint(0, 5)}/{r.randint(0, 900)} {r.choice([200, 201, 404])} "
                                  f"{r.randint(100, 90000)} - - ---- {r.randint(1, 900)}/{r.randint(1, 90)}/"
                                  f"{r.randint(0, 9)}/{r.randint(0, 9)}/0 0/0 \"GET {_path(r)} HTTP/1.1\""),
        "px-down": (3, lambda r: f"gatewayd[{_pid(r)}]: Server {back(r)} is DOWN, reason: Layer4 connection problem, "
                                 f"info: \"Connection refused\", check duration: {r.randint(0, 9)}ms. "
                                 f"{r.randint(0, 2)} active and 0 backup servers left."),
        "px-up": (3, lambda r: f"gatewayd[{_pid(r)}]: Server {back(r)} is UP, reason: Layer7 check passed, code: 200, "
                               f"check duration: {r.randint(0, 9)}ms. {r.randint(1, 3)} active and 0 backup servers online."),
        "px-upstream": (10, lambda r: f"upstream timed out (110: Connection timed out) while reading response header from "
                                      f"upstream, client: {_ip(r)}, server: {_host(r)}, request: \"GET {_path(r)} HTTP/1.1\", "
                                      f"upstream: \"http://{_ip(r)}:{_port(r)}{_path(r)}\", host: \"{_host(r)}\""),
        "px-connect": (10, lambda r: f"connect() failed (111: Connection refused) while connecting to upstream, client: "
                                     f"{_ip(r)}, server: {_host(r)}"),
        "px-reload": (1, lambda r: f"gatewayd[{_pid(r)}]: Proxy {front(r)} started."),
    }


def _db(r: R) -> dict[str, tuple[int, Maker]]:
    pg = lambda r: f"[{_pid(r)}]"
    return {
        "db-slow": (25, lambda r: f"{pg(r)} LOG:  duration: {r.uniform(100, 9000):.3f} ms  statement: SELECT id FROM "
                                  f"parcels WHERE locker_id = {r.randint(1, 900)}"),
        "db-conn": (15, lambda r: f"{pg(r)} LOG:  connection received: host={_ip(r)} port={_port(r)}"),
        "db-auth": (15, lambda r: f"{pg(r)} LOG:  connection authorized: user={_user(r)} database="
                                  f"{r.choice(['lockers', 'billing', 'audit'])} application_name={r.choice(['api', 'psql'])}"),
        "db-disc": (12, lambda r: f"{pg(r)} LOG:  disconnection: session time: 0:{r.randint(10, 59)}:"
                                  f"{r.uniform(10, 59):.3f} user={_user(r)} database={r.choice(['lockers', 'billing'])} "
                                  f"host={_ip(r)} port={_port(r)}"),
        "db-ckpt-start": (3, lambda r: f"{pg(r)} LOG:  checkpoint starting: time"),
        "db-ckpt-done": (3, lambda r: f"{pg(r)} LOG:  checkpoint complete: wrote {r.randint(1, 9999)} buffers "
                                      f"({r.uniform(0, 9):.1f}%); 0 WAL file(s) added, {r.randint(0, 3)} removed, "
                                      f"{r.randint(0, 3)} recycled; write={r.uniform(0, 300):.3f} s, sync={r.uniform(0, 1):.3f} s, "
                                      f"total={r.uniform(0, 300):.3f} s"),
        "db-deadlock": (2, lambda r: f"{pg(r)} ERROR:  deadlock detected"),
        "db-dup": (5, lambda r: f"{pg(r)} ERROR:  duplicate key value violates unique constraint \"parcels_pkey\""),
        "db-fatal-pw": (3, lambda r: f"{pg(r)} FATAL:  password authentication failed for user \"{_user(r)}\""),
    }


def _scheduler(r: R) -> dict[str, tuple[int, Maker]]:
    job = lambda r: r.randint(10**5, 10**6)
    nodes = lambda r: ",".join(f"node{r.randint(1, 64):02d}" for _ in range(r.randint(1, 5)))
    return {
        "sch-alloc": (15, lambda r: f"sched: Allocate JobId={job(r)} NodeList={nodes(r)} #CPUs={r.randint(1, 64)} "
                                    f"Partition={r.choice(['batch', 'short', 'gpu'])}"),
        "sch-submit": (15, lambda r: f"_rpc_submit_batch_job: JobId={job(r)} InitPrio={r.randint(1, 9999)} "
                                     f"usec={r.randint(100, 9999)}"),
        "sch-done": (15, lambda r: f"_job_complete: JobId={job(r)} WEXITSTATUS {r.choice([0, 1, 2])}"),
        "sch-done2": (15, lambda r: f"_job_complete: JobId={job(r)} done"),
        "sch-cron": (10, lambda r: f"CRON[{_pid(r)}]: ({_user(r)}) CMD (/usr/local/bin/{_word(r)}.sh --quiet)"),
        "sch-timeout": (3, lambda r: f"Time limit exhausted for JobId={job(r)}"),
        "sch-node-down": (2, lambda r: f"error: Nodes {nodes(r)} not responding, setting DOWN"),
        "sch-backfill": (5, lambda r: f"backfill: Started JobId={job(r)} in {r.choice(['batch', 'short'])} on {nodes(r)}"),
    }


def _storage(r: R) -> dict[str, tuple[int, Maker]]:
    blk = lambda r: f"blk_{r.choice(['', '-'])}{r.randint(10**17, 10**18)}"
    hp = lambda r: f"/{_ip(r)}:{_port(r)}"
    return {
        "st-recv": (20, lambda r: f"Receiving block {blk(r)} src: {hp(r)} dest: {hp(r)}"),
        "st-received": (20, lambda r: f"Received block {blk(r)} of size {r.randint(10**4, 10**8)} from {hp(r)}"),
        "st-responder": (20, lambda r: f"PacketResponder {r.randint(0, 2)} for block {blk(r)} terminating"),
        "st-alloc": (10, lambda r: f"BLOCK* NameSystem.allocateBlock: {_path(r)}/part-{r.randint(0, 99999):05d}. {blk(r)}"),
        "st-stored": (10, lambda r: f"BLOCK* NameSystem.addStoredBlock: blockMap updated: {_ip(r)}:{_port(r)} is added "
                                    f"to {blk(r)} size {r.randint(10**4, 10**8)}"),
        "st-delete": (5, lambda r: f"BLOCK* ask {_ip(r)}:{_port(r)} to delete "
                                   + " ".join(blk(r) for _ in range(r.randint(1, 8)))),
        "st-verify": (5, lambda r: f"Verification succeeded for {blk(r)}"),
        "st-served": (5, lambda r: f"{_ip(r)}:{_port(r)}:Served block {blk(r)} to {hp(r)}"),
        "st-exc": (2, lambda r: f"{_ip(r)}:{_port(r)}:Got exception while serving {blk(r)} to {hp(r)}:"),
    }


def _firmware(r: R) -> dict[str, tuple[int, Maker]]:
    """Short statements told apart by one word (engaged / released), beside a word that is a
    variable with few values (the kiosk's mode): what a similarity bar must not merge."""
    slot = lambda r: r.randint(1, 48)
    kiosk = lambda r: f"LK-{r.randint(1, 900)}"
    return {
        "fw-lock-on": (15, lambda r: f"compartment {slot(r)} lock engaged"),
        "fw-lock-off": (15, lambda r: f"compartment {slot(r)} lock released"),
        "fw-charge": (8, lambda r: f"battery at {r.randint(5, 100)}% charging"),
        "fw-discharge": (8, lambda r: f"battery at {r.randint(5, 100)}% discharging"),
        "fw-door-open": (10, lambda r: f"door opened by courier {_user(r)} at {kiosk(r)}"),
        "fw-door-close": (10, lambda r: f"door closed by courier {_user(r)} at {kiosk(r)}"),
        "fw-mode": (6, lambda r: f"kiosk {kiosk(r)} switched to {r.choice(['maintenance', 'service', 'normal'])} mode"),
        "fw-sensor": (6, lambda r: f"compartment {slot(r)} sensor reads {r.choice(['open', 'closed', 'fault'])} "
                                   f"after {r.randint(1, 90)} s"),
    }


SHAPES: dict[str, Callable[[R], dict[str, tuple[int, Maker]]]] = {
    "sshd": _ssh, "webserver": _web, "jvm": _jvm, "kernel": _kernel, "proxy": _proxy,
    "database": _db, "scheduler": _scheduler, "storage": _storage, "firmware": _firmware,
}


def corpus(shape: str, n: int = 2000, seed: int = 7) -> tuple[list[str], list[str]]:
    """``n`` messages of one shape: (true template ids, messages), templates drawn by weight."""
    r = random.Random(f"{shape}:{seed}")
    table = SHAPES[shape](r)
    names = list(table)
    weights = [table[k][0] for k in names]
    truth = r.choices(names, weights, k=n)
    return truth, [table[t][1](r) for t in truth]


def grouping_accuracy(truth: Sequence[str], groups: Sequence[int]) -> float:
    """Grouping accuracy, the usual measure of template mining in the log-parsing literature
    (from memory): the share of messages whose mined group holds exactly the messages of their
    true template — a message counts only when its whole group is right."""
    by_truth, by_group = defaultdict(set), defaultdict(set)
    for i, (t, g) in enumerate(zip(truth, groups)):
        by_truth[t].add(i)
        by_group[g].add(i)
    return sum(1 for t, g in zip(truth, groups) if by_truth[t] == by_group[g]) / len(truth)
