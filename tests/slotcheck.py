"""A client wrapper that fails any atomic operation spanning two Redis Cluster hash slots.

fakeredis and a single redis-server accept an EVAL or a MULTI/EXEC over keys of
different slots; a Redis Cluster refuses it with CROSSSLOT.  ``SlotChecked``
wraps a client (fakeredis or real) and, before each EVAL/EVALSHA (scripts
registered through it included) and each transaction pipeline's EXEC (with the
keys it WATCHed), asserts that all the keys share ``redis.crc.key_slot`` (the
slot function of redis-py's cluster client).  Each checked operation is
recorded in ``checked`` as ``(kind, keys)`` so a test can also assert that its
operation was seen.

Keys of a queued command are found as Redis's command table gives them for the
commands Seawall queues in a transaction: the first argument, or every
argument for DEL/UNLINK/EXISTS/TOUCH/MGET; PUBLISH names a channel, not a key.
"""
from __future__ import annotations

from redis.commands.core import Script
from redis.crc import key_slot

ALL_ARGS_ARE_KEYS = {"DEL", "UNLINK", "EXISTS", "TOUCH", "MGET", "WATCH"}
NO_KEYS = {"PUBLISH", "MULTI", "EXEC", "PING"}


class CrossSlotError(AssertionError):
    pass


def _b(key) -> bytes:
    return key if isinstance(key, bytes) else str(key).encode("utf-8")


def assert_one_slot(kind: str, keys) -> None:
    slots = {key_slot(_b(k)) for k in keys}
    if len(slots) > 1:
        raise CrossSlotError(f"{kind} spans {len(slots)} hash slots: {sorted(map(str, keys))}")


def command_keys(args) -> list:
    name = (args[0].decode() if isinstance(args[0], bytes) else str(args[0])).upper()
    if name in NO_KEYS or len(args) < 2:
        return []
    if name in ("EVAL", "EVALSHA"):
        return list(args[3:3 + int(args[2])])
    if name in ALL_ARGS_ARE_KEYS:
        return list(args[1:])
    return [args[1]]


class _CheckedPipeline:
    def __init__(self, owner: "SlotChecked", pipe, transaction: bool):
        self._owner = owner
        self._pipe = pipe
        self._transaction = transaction
        self._watched: list = []

    def __getattr__(self, name):
        return getattr(self._pipe, name)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return self._pipe.__exit__(*exc)

    def __len__(self):
        return len(self._pipe)

    def watch(self, *names):
        self._watched += names
        return self._pipe.watch(*names)

    def execute(self, *args, **kwargs):
        keys = list(self._watched)
        evals = []
        for entry in self._pipe.command_stack:
            cmd_args = entry[0] if isinstance(entry, tuple) else entry.args
            found = command_keys(cmd_args)
            keys += found
            name = str(cmd_args[0]).upper()
            if name in ("EVAL", "EVALSHA"):
                evals.append(found)
        for found in evals:
            assert_one_slot("EVAL in a pipeline", found)
            self._owner.checked.append(("eval", list(found)))
        if self._transaction and keys:
            assert_one_slot("MULTI/EXEC", keys)
            self._owner.checked.append(("multi", keys))
        self._watched = []
        return self._pipe.execute(*args, **kwargs)


class SlotChecked:
    """``client`` with every EVAL and MULTI/EXEC checked to stay in one hash slot."""

    def __init__(self, client):
        self._client = client
        self.checked: list[tuple[str, list]] = []

    def __getattr__(self, name):
        return getattr(self._client, name)

    def eval(self, script, numkeys, *args):
        keys = list(args[:int(numkeys)])
        assert_one_slot("EVAL", keys)
        self.checked.append(("eval", keys))
        return self._client.eval(script, numkeys, *args)

    def evalsha(self, sha, numkeys, *args):
        keys = list(args[:int(numkeys)])
        assert_one_slot("EVALSHA", keys)
        self.checked.append(("eval", keys))
        return self._client.evalsha(sha, numkeys, *args)

    def register_script(self, script):
        return Script(self, script)

    def pipeline(self, transaction: bool = True, shard_hint=None):
        return _CheckedPipeline(self, self._client.pipeline(transaction=transaction, shard_hint=shard_hint),
                                transaction)

    def scripts_and_transactions(self) -> list[tuple[str, list]]:
        """The multi-key operations seen so far (single-key ones are in ``checked`` too)."""
        return [(kind, keys) for kind, keys in self.checked if len(keys) > 1]
