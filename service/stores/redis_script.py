"""One identifier's part of an event as one server-side script (a single node's fast path).

`queue_writes` (`service.stores.redis_keys`) sends an identifier's read and writes as five to
eight plain commands; `PROFILE_UPDATE` does the same commands inside Redis, on the same one key,
in the same order, with the same arguments, and returns what the read returned. The state it
leaves is therefore the state the plain commands leave, bit for bit: numbers travel as the
shortest text that round-trips (Python's ``repr``) and reach ZINCRBY and ZADD as that text,
never as a Lua number (whose ``tostring`` keeps only 14 digits).

A script touches one key, so it would be valid on Redis Cluster too; the store still sends plain
commands there, because redis-py's cluster pipeline does not run scripts.
"""

from __future__ import annotations

import functools
import hashlib
from collections.abc import Callable
from typing import Any

from service.stores.redis_keys import ProfileWrites

PROFILE_UPDATE = b"""
local key = KEYS[1]
local function words(text)
  local out = {}
  for word in string.gmatch(text, '%S+') do
    out[#out + 1] = word
  end
  return out
end
local before = {}
if ARGV[1] == '1' then
  before = redis.call('ZRANGE', key, 0, -1, 'WITHSCORES')
end
local increments = words(ARGV[3])
for i = 1, #increments, 2 do
  redis.call('ZINCRBY', key, increments[i + 1], increments[i])
end
local lowest = words(ARGV[4])
if #lowest > 0 then
  redis.call('ZADD', key, 'LT', unpack(lowest))
end
local highest = words(ARGV[5])
if #highest > 0 then
  redis.call('ZADD', key, 'GT', unpack(highest))
end
local stale = words(ARGV[6])
if #stale > 0 then
  redis.call('ZREM', key, unpack(stale))
end
redis.call('EXPIRE', key, ARGV[2])
return table.concat(before, ' ')
"""
"""ARGV: read (``1``/``0``), TTL seconds, then four lists of words separated by spaces: the
increments (member, number), the minima and the maxima (number, member), the stale members.
Returns the sorted set as it was before, as one text ``member score member score ...`` (scores
as Redis writes them, enough digits to read back the same double), when read, else an empty
text: one reply to parse instead of two per member. Member names never hold a space
(`Profile.to_members`)."""

PROFILE_UPDATE_SHA = hashlib.sha1(PROFILE_UPDATE).hexdigest()
"""What EVALSHA names the script by (SHA-1 of its text, as SCRIPT LOAD answers)."""


class ScriptCalls:
    """EVALSHA commands of `PROFILE_UPDATE` for the identifiers of one event.

    `packed` gives a whole command in the Redis serialization protocol, ready for
    `redis_wire.Wire` (the same bytes `redis_wire.pack` makes of ``args``). The parts
    `WritePlanner.event` shares between identifiers (the same objects) are written out once per
    object; use one `ScriptCalls` per event.

    Examples
    --------
    >>> w = ProfileWrites({"0.1": 2.0, "1.0": 0.5}, {"f": 7.0}, {"l": 7.0, "a3": 7.0}, ("0.-1",))
    >>> calls = ScriptCalls(ttl_s=60, read=True)
    >>> calls.args(w)
    ['1', '60', '0.1 2.0 1.0 0.5', '7.0 f', '7.0 l 7.0 a3', '0.-1']
    >>> from service.stores.redis_wire import pack
    >>> command = ("EVALSHA", PROFILE_UPDATE_SHA, 1, "es{k}", *calls.args(w))
    >>> calls.packed("es{k}", w) == pack([command])
    True
    """

    def __init__(self, ttl_s: int, read: bool) -> None:
        self._head = _fixed_argv(ttl_s, read)
        self._packed_head, self._packed_argv = _packed_fixed(ttl_s, read)
        self._packed: dict[int, tuple[object, bytes]] = {}

    def args(self, write: ProfileWrites) -> list[str]:
        """ARGV for one identifier's writes, as text."""
        return [*self._head, *(write_out(part) for part, write_out in _parts(write))]

    def packed(self, key: str, write: ProfileWrites) -> bytes:
        """The whole EVALSHA command for one identifier's key and writes, packed."""
        out = [self._packed_head, _bulk(key.encode()), self._packed_argv]
        known = self._packed
        for part, write_out in _parts(write):
            # Kept with the part itself, so that no other object can take its id meanwhile.
            held = known.get(id(part))
            if held is None:
                held = known[id(part)] = (part, _bulk(write_out(part).encode()))
            out.append(held[1])
        return b"".join(out)


def _parts(write: ProfileWrites) -> tuple[tuple[Any, Callable[[Any], str]], ...]:
    return (
        (write.increments, _increments),
        (write.lowest, _scores),
        (write.highest, _scores),
        (write.stale, " ".join),
    )


@functools.lru_cache(maxsize=8)
def _packed_fixed(ttl_s: int, read: bool) -> tuple[bytes, bytes]:
    """The packed parts of a call that are the same for every identifier: the command, script
    and key count before the key, and the first two ARGV after it (every event, every call)."""
    head = b"*10\r\n" + b"".join(_bulk(x) for x in (b"EVALSHA", _SHA, b"1"))
    return head, b"".join(_bulk(x.encode()) for x in _fixed_argv(ttl_s, read))


def _fixed_argv(ttl_s: int, read: bool) -> list[str]:
    """The first two ARGV of every call: whether to read the set back, and the key's TTL."""
    return ["1" if read else "0", str(ttl_s)]


_SHA = PROFILE_UPDATE_SHA.encode()


def _bulk(data: bytes) -> bytes:
    return b"$%d\r\n%s\r\n" % (len(data), data)


def _increments(part: dict[str, float]) -> str:
    return " ".join([f"{name} {value!r}" for name, value in part.items()])


def _scores(part: dict[str, float]) -> str:
    return " ".join([f"{value!r} {name}" for name, value in part.items()])


def members_of(reply: bytes) -> dict[str, float]:
    """The script's reply as member -> score.

    >>> members_of(b"f 1790000000 0.1 2.5")
    {'f': 1790000000.0, '0.1': 2.5}
    >>> members_of(b"")
    {}
    """
    if not reply:
        return {}
    words = reply.decode().split(" ")
    return dict(zip(words[::2], map(float, words[1::2]), strict=True))
