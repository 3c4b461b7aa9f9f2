"""Templates: a record's message becomes an event template.

Stage: formats → **templates** → sessions. Variable parts (quoted values, URLs, paths, the
value of ``key=value`` and any token holding a digit: numbers, ids, hex, UUIDs, IPs,
durations — but for a name with single digits inside its words, as ``ssh2``) are masked to
``<var>``; then an online miner groups messages by token count and
leading tokens and merges similar ones into templates with wildcards — the fixed-depth
prefix-tree method:

    P. He, J. Zhu, Z. Zheng, M. R. Lyu, "Drain: An Online Log Parsing Approach with Fixed
    Depth Tree", IEEE International Conference on Web Services (ICWS) 2017, pp. 33–40.

Two changes to the paper's similarity: it is the share of equal tokens over the positions
where both the template and the message hold a constant (a wildcard, or a masked token that
covers the other such as ``[<var>]`` and ``[main]``, counts neither way), so a line made mostly
of variables joins on its few constants; and a token in brackets (``(alice)``) routes as a
variable. Known limits: a digitless variable among the routing tokens, or two of them in a
short statement, still split a template; a constant with a run of two digits (``sha256``,
``x86_64``) or a digit after a capital (``MD5``) is masked, and a name numbered below ten
(``web3``, ``eth0``) is kept.

Messages that differ only in their digits are one template: the caches key messages by their
digit shape (every digit as 0), so whether a token is kept is decided from that shape, and a
kept token stands for every token of its shape (``eth1`` joins the template ``eth0`` made;
the template keeps the text of the first message that made it).

Each template gets a stable id (a hash of the first masked message that created it, kept
names' digits as 0) and a dense index used by the feature stage. Structured records (span
names, syscalls) carry an ``event`` and map to an event template directly. When the miner is frozen (scoring), baseline
templates are matched but never changed; what is created after the freeze is *unseen*.
"""

from __future__ import annotations

import hashlib
import re
import string
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass
from operator import methodcaller

import numpy as np

WILDCARD = "<var>"

_QUOTED = re.compile(r'"[^"]*"')
_TRAILING = ",;:.)]}>'"
_LEADING = "([{<'/"
_OPENING = "([{<'"
# a host name with no digit: three or more lower-case DNS labels (a class name has capitals)
_HOST = re.compile(r"[a-z][a-z-]*(?:\.[a-z][a-z-]*){2,}(?::[a-z]+)?")
_DIGITS = frozenset("0123456789")
_ASCII_LETTERS = frozenset(string.ascii_letters)
_ZERO_DIGITS = bytes.maketrans(b"123456789", b"000000000")
_ZERO_TEXT = str.maketrans("123456789", "000000000")
_encode = methodcaller("encode", "utf-8", "surrogatepass")
_zero = methodcaller("translate", _ZERO_DIGITS)


def _shape_of(message: str) -> bytes:
    """The cache key of a message: its bytes with every digit turned into 0."""
    return _zero(_encode(message))


def _shapes(messages: list[str]) -> list[bytes]:
    """``_shape_of`` of every message, with one encode, one translate and one split for the
    whole list when no message holds the NUL separator (nearly always)."""
    joined = "\0".join(messages)
    if len(messages) < 2 or joined.count("\0") != len(messages) - 1:
        return list(map(_shape_of, messages))
    return _zero(_encode(joined)).split(b"\0")


# a run of hex digits and dashes holding a digit (ids, hex, UUIDs); the look-behind starts a
# match only where a run starts, so a long run without a digit costs one scan, not one per char
_ID_RUN = re.compile(rb"(?<![0-9a-fA-F-])[a-fA-F-]*+[0-9][0-9a-fA-F-]*+")


# The single-digit rule, written once: a digit belongs to a name (ssh2, utf8, IPv4) when the two
# bytes before it are a letter and then a lower-case letter. _KEPT (a regex), _after_word and
# _WORD_CLASS (numpy, as byte sets) are built from these two classes.
_TWO_BEFORE, _ONE_BEFORE = "[A-Za-z]", "[a-z]"
_NAME_DIGIT = f"{_TWO_BEFORE}{_ONE_BEFORE}[0-9]"
_LETTER, _LOWER = (frozenset(c for c in range(256) if re.fullmatch(cls, chr(c)))
                   for cls in (_TWO_BEFORE, _ONE_BEFORE))


def _collapse_run(run: re.Match) -> bytes:
    """The coarse form of an id-like run of a shape (its digits are 0): the run itself if it
    holds one digit, right after two letters, the second lower-case (as in ``ssh2``, ``utf8``:
    where ``_KEPT`` may keep a name); else ``00`` after such two letters (``node01``,
    ``ssh12``: a run of two bytes or more, as a run of one byte there is kept) and ``0`` after
    anything else (``12``, ``blk_-12``, ``10.0.0.1``), so a kept run and a marker stay apart."""
    text, data, start = run.group(), run.string, run.start()
    if text.count(b"0") == 1 and _after_word(data, start + text.find(b"0")):
        return text
    return b"00" if _after_word(data, start) else b"0"


def _after_word(data: bytes, i: int) -> bool:
    return i > 1 and data[i - 1] in _LOWER and data[i - 2] in _LETTER


# byte classes for _collapse_id_runs: 2 a digit, 1 a hex letter or a dash, 0 anything else
_ID_CLASS = bytes(2 if chr(c) in "0123456789" else 1 if chr(c) in "abcdefABCDEF-" else 0 for c in range(256))
# and for the bytes before a digit: bit 1 where it may come just before it, bit 0 where two before
_WORD_CLASS = bytes((2 if c in _LOWER else 0) | (1 if c in _LETTER else 0) for c in range(256))


def _collapse_id_runs(data: bytes) -> bytes:
    """``_ID_RUN.sub(_collapse_run, data)``, computed with numpy (several times quicker than
    the regex, whose engine visits every byte in Python's own loop)."""
    cls = np.frombuffer(data.translate(_ID_CLASS), dtype=np.uint8)
    if not cls.size:
        return data
    in_run = cls != 0
    starts = in_run.copy()
    starts[1:] &= ~in_run[:-1]
    run = starts.cumsum(dtype=np.int32)  # the number of the run each byte is in (where in_run)
    word = np.frombuffer((b"\0\0" + data).translate(_WORD_CLASS), dtype=np.uint8)
    after_word = ((word[1:-1] >> 1) & word[:-2]).view(bool)  # after two letters, the second lower-case
    digit = cls == 2
    # per run, 1 for a digit after a word and 2 for any other: a run is kept where the sum is 1
    weight = (digit.view(np.uint8) << 1) - (digit & after_word).view(np.uint8)
    start_at = np.flatnonzero(starts)
    if not start_at.size:
        return data
    collapsed = np.zeros(start_at.size + 1, dtype=bool)  # by run number; 0 before the first run
    collapsed[1:] = np.add.reduceat(weight, start_at, dtype=np.int32) > 1
    id_run = in_run & collapsed[run]
    head = id_run & starts  # becomes 0, and the byte after it too after a word
    head[1:] |= head[:-1] & after_word[:-1]  # such a run holds two bytes or more
    out = np.frombuffer(data, dtype=np.uint8).copy()
    out[head] = 48
    return out[~id_run | head].tobytes()


def _coarse(shapes: list[bytes]) -> list[bytes]:
    """Coarse cache keys: every id-like run (``_ID_RUN``) of a shape turned into one 0 (``00``
    after a letter), but for a run of one digit after a word (``_collapse_run``). Messages
    with equal coarse keys mask alike: such a run lies inside one token, keeps a digit, and
    touches none of what masking looks at besides digits (whitespace, quotes, ``=``, ``/``,
    ``://``, trailing punctuation); and ``_KEPT`` keeps a name only where every run stays."""
    joined = b"\0".join(shapes)
    if joined.count(b"\0") != len(shapes) - 1:
        return [_ID_RUN.sub(_collapse_run, s) for s in shapes]
    return _collapse_id_runs(joined).split(b"\0")


# A name with digits that is kept as a constant: a word (letters, underscores, an opening
# parenthesis of a call at the end) in which every digit is a single one right after two
# letters, the second lower-case — ssh2, http2, utf8, md5, IPv4, TLSv1, mod_jk2, jk2_init(),
# log4j. Common practice in naming (a rule of thumb): a protocol, encoding or module names its
# version or variant with one digit after a lower-case word, while ids number their items with
# several digits (node01, u123, CR9179), with capitals (PX1, CPU3) or after a dash or an
# underscore (LK-4, worker_3). Decided from the digit shape, as the caches need (see
# TemplateCache): the look-ahead rejects two digits in one run of hex digits, which the coarse
# key cannot tell apart from a longer number (sha256, x86_64 and ab1cd2 stay variables).
_KEPT = re.compile(rf"(?!.*[0-9][0-9a-fA-F]*[0-9])(?:[A-Za-z][A-Za-z_]*)?{_NAME_DIGIT}"
                   rf"(?:[A-Za-z_]*{_NAME_DIGIT})*[A-Za-z_]*\(?")


def _mask_token(tok: str) -> str:
    if "://" in tok or tok[0] == "/":  # URLs and absolute paths
        return WILDCARD
    key, eq, value = tok.partition("=")
    if eq and key and value and WILDCARD not in value and _DIGITS.isdisjoint(key):  # key=value keeps its key; the value is variable
        return key + "=" + _mask_value(value)
    if _DIGITS.isdisjoint(tok):
        if tok[0] in _OPENING and "/" in tok:  # a path in brackets: (/usr/bin/x
            start = len(tok) - len(tok.lstrip(_OPENING))
            if tok[start] == "/":
                return tok[:start] + _mask_value(tok[start:])
        return WILDCARD if "." in tok and _HOST.fullmatch(tok.rstrip(_TRAILING)) else tok
    end = _value_end(tok)
    start, bracket = 0, tok.find("[")
    if 0 < bracket < end and _DIGITS.isdisjoint(tok[:bracket]):  # a program's pid: name[<var>]
        start = bracket + 1
    else:
        while start < end - 1 and tok[start] in _LEADING:  # and leading brackets: [<var>]
            start += 1
    if tok[start] in _ASCII_LETTERS and _KEPT.fullmatch(tok, start, end):  # ssh2, (IPv4), jk2_init():
        return tok
    return tok[:start] + WILDCARD + tok[end:]


def _value_end(tok: str) -> int:
    """Where a token's value ends: before its trailing punctuation (kept in the template)."""
    end = len(tok)
    while end > 1 and tok[end - 1] in _TRAILING:
        end -= 1
    return end


def _mask_value(value: str) -> str:
    """A variable value as ``<var>``, its trailing punctuation kept."""
    return WILDCARD + value[_value_end(value):]


_ID_RUN_TEXT = re.compile(_ID_RUN.pattern.decode())


def _collapse_lists(tokens: list[str], raw: list[str]) -> list[str]:
    """A run of bare ``<var>`` tokens of one kind (equal once their id-like runs are taken out,
    as ``blk_1 blk_-2``) as one: a list of ids is one template whatever its length."""
    out = [tokens[0]]
    for i in range(1, len(tokens)):
        tok = tokens[i]
        if tok != WILDCARD or tokens[i - 1] != WILDCARD or (
                _ID_RUN_TEXT.sub("", raw[i]) != _ID_RUN_TEXT.sub("", raw[i - 1])):
            out.append(tok)
    return out


def mask(message: str) -> str:
    """The message with every variable part replaced by ``<var>``, whitespace normalised.

    Variable parts: double-quoted values, URLs, absolute paths, and any token holding a digit
    (numbers, ids, hex, UUIDs, IPs, durations, versions — common practice in template mining)
    but a name with single digits in its words (``ssh2``, ``jk2_init()``: ``_KEPT``),
    keeping a ``key=`` prefix and trailing punctuation. Token-wise string tests, not one large
    regex: about ten times faster on typical lines.
    """
    if '"' in message:
        message = _QUOTED.sub(WILDCARD, message)
    raw = message.split()
    tokens = [tok if tok.isalpha() else _mask_token(tok) for tok in raw]
    if tokens.count(WILDCARD) > 1:
        tokens = _collapse_lists(tokens, raw)
    return " ".join(tokens)


def _covers(pattern: str, token: str) -> bool:
    """Whether a token with a variable (``<var>``, ``[<var>]``, ``key=<var>,``) stands for
    ``token``: what is around its variables starts and ends ``token`` too."""
    if WILDCARD not in pattern:
        return False
    parts = pattern.split(WILDCARD)
    return (len(token) >= len(parts[0]) + len(parts[-1]) and token.startswith(parts[0])
            and token.endswith(parts[-1]))


def _alike(a: str, b: str) -> bool:
    """Whether two tokens are one constant: equal, or kept names of one digit shape (``ssh1``
    and ``ssh2``), which every cache already treats as one."""
    return a == b or (len(a) == len(b) and a.translate(_ZERO_TEXT) == b.translate(_ZERO_TEXT))


def _masked_key(masked: str) -> str:
    """A masked message as the ``masked`` cache keys it: its digits (only kept names hold any)
    as 0, so that messages of one digit shape share one entry."""
    return masked if _DIGITS.isdisjoint(masked) else masked.translate(_ZERO_TEXT)


def _generalise(a: str, b: str) -> str:
    """One token of a template that stands for both ``a`` and ``b`` (``a``'s text where both are
    one constant)."""
    if a == b or _covers(a, b) or _alike(a, b):
        return a
    return b if _covers(b, a) else WILDCARD


def _stable_id(text: str) -> str:
    return hashlib.blake2b(text.encode("utf-8", "replace"), digest_size=5).hexdigest()


SEVERE = 3  # error and worse
_SEVERITY_WORDS = (("emerg", 3), ("alert", 3), ("crit", 3), ("fatal", 3), ("panic", 3), ("err", 3),
                   ("sever", 3), ("warn", 2))


def severity(level: str | None) -> int:
    """A record's level as a rank: 0 none, 1 info or below, 2 warning, 3 (:data:`SEVERE`) error
    and worse — the names of RFC 5424's severities and of the common logging libraries."""
    if not level:
        return 0
    low = level.lower()
    return next((rank for word, rank in _SEVERITY_WORDS if low.startswith(word)), 1)


@dataclass(slots=True)
class Template:
    id: str
    index: int
    tokens: list[str]
    path: tuple[str, ...]
    count: int = 0
    structured: bool = False  # an event type given by the record, not mined
    seen: bool = True  # known to the baseline
    severity: int = 0  # unseen templates: the worst level of their records (see severity())

    @property
    def text(self) -> str:
        return " ".join(self.tokens)


class TemplateCache:
    """Which template a message maps to, remembered at three levels so that most messages skip
    the masking and the tree:

    - ``masked``: a masked message (digits of kept names as 0: ``_masked_key``) → the template
      the miner chose for it. This is the miner's
      memory (a daemon's checkpoint saves it), so a message maps where its like went before,
      even after that template was generalised;
    - ``shapes``: the message with every digit as 0 → template (messages that differ only in
      their digits mask alike);
    - ``coarse``: the shape with every id-like run as one 0 → template (stays small however
      many distinct ids a log carries).

    ``shapes`` and ``coarse`` only ever repeat what ``masked`` says. One bound and one policy:
    a level that would pass ``bound`` entries is emptied, and emptying ``masked`` empties the
    two levels derived from it; so memory stays bounded, emptying a derived level never changes
    a result, and when ``masked`` is emptied depends only on what it held (restored from a
    checkpoint, a restart empties it at the same message as a run without the restart would).
    """

    def __init__(self, bound: int = 100_000) -> None:
        self.bound = bound
        self.masked: dict[str, int] = {}
        self.shapes: dict[bytes, int] = {}
        self.coarse: dict[bytes, int] = {}
        self.emptied = 0  # times ``masked`` was emptied: what was decided before may not be remembered after

    def clear(self) -> None:
        self.emptied += 1
        self.masked.clear()
        self.shapes.clear()
        self.coarse.clear()

    def remember_masked(self, masked: str, idx: int) -> None:
        if len(self.masked) >= self.bound:
            self.clear()
        self.masked[masked] = idx

    def remember(self, level: dict, keys: Sequence, idxs: Sequence[int]) -> None:
        """Put ``keys`` → ``idxs`` in ``shapes`` or ``coarse``."""
        if len(level) + len(keys) > self.bound:
            level.clear()
            keys, idxs = keys[:self.bound], idxs[:self.bound]
        level.update(zip(keys, idxs))

    def __len__(self) -> int:
        return len(self.masked) + len(self.shapes) + len(self.coarse)


class TemplateTree:
    """Online template learning with the fixed-depth prefix-tree method (He et al., ICWS 2017).

    Messages are routed by their token count and then by their first ``routing_tokens``
    tokens; ``join_share`` is the share of equal tokens, over the positions where both hold a
    constant, needed to join a template there; a
    node with ``max_branches`` branches sends new tokens to ``<var>``.
    """

    def __init__(self, routing_tokens: int = 2, join_share: float = 0.75, max_branches: int = 100,
                 cache_size: int = 100_000) -> None:
        self.routing_tokens = routing_tokens
        self.join_share = join_share
        self.max_branches = max_branches
        self.cache_size = cache_size
        self.templates: list[Template] = []
        self._ids: dict[str, int] = {}
        self._tree: dict = {}
        self._events: dict[str, int] = {}
        self._by_length: dict[int, list[int]] = {}  # mined templates by token count, for merging
        self.cache = TemplateCache(cache_size)
        self.frozen = False
        self.n_seen = 0  # templates with index < n_seen belong to the baseline

    # -- public -----------------------------------------------------------------
    def add(self, message: str) -> int:
        """Template index for a message (creating or generalising a template as needed)."""
        return self.add_many([message])[0]

    def add_many(self, messages: Sequence[str], events: Sequence[str | None] | None = None) -> list[int]:
        """Template indices of many messages, in order; where ``events`` gives an event type, it
        is the template (:meth:`add_event`) and the message is not mined. Messages that differ
        only in their digits mask alike (a token with a digit becomes one wildcard), so the
        message with every digit turned into 0 keys a cache that skips the masking for most
        lines seen before; the lookups run in C (``map``) and only the misses are handled one
        by one."""
        if events is not None and events.count(None) != len(events):
            return self._add_mixed(messages, events)
        shapes = _shapes(messages)
        idxs = list(map(self.cache.shapes.get, shapes))
        if None in idxs:
            self._add_missed(messages, shapes, idxs)
        self._count(idxs)
        return idxs

    def _count(self, idxs: list[int]) -> None:
        """Count a block's records into their templates, once per template."""
        templates = self.templates
        for idx, n in Counter(idxs).items():
            templates[idx].count += n

    def _add_mixed(self, messages: Sequence[str], events: Sequence[str | None]) -> list[int]:
        if None not in events:  # every record a structured event (spans): looked up in C, counted once
            idxs = list(map(self._events.get, events))
            if None in idxs:
                idxs = [self.add_event(e, 0) if i is None else i for e, i in zip(events, idxs)]
            self._count(idxs)
            return idxs
        mined = [m for m, e in zip(messages, events) if e is None]
        it = iter(self.add_many(mined) if mined else ())
        return [next(it) if e is None else self.add_event(e) for e in events]

    def _add_missed(self, messages: Sequence[str], shapes: list[bytes], idxs: list[int | None]) -> None:
        """Fill in the indices of messages whose shape missed the cache. Their coarse shapes
        (``_coarse``: ids and UUIDs as one 0) key a second cache that stays small however many
        distinct ids a log carries; only messages whose coarse shape is new too are masked."""
        cache = self.cache
        emptied = cache.emptied
        miss = [i for i, idx in enumerate(idxs) if idx is None]
        missed = [shapes[i] for i in miss]
        keys = _coarse(missed)
        found = list(map(cache.coarse.get, keys))
        if None in found:
            new: dict[bytes, int] = {}
            for j, idx in enumerate(found):
                if idx is None:
                    key = keys[j]
                    idx = new.get(key)
                    if idx is None:
                        idx = new[key] = self._add_masked(mask(messages[miss[j]]))
                    found[j] = idx
            if cache.emptied == emptied:
                cache.remember(cache.coarse, list(new), list(new.values()))
        for i, idx in zip(miss, found):
            idxs[i] = idx
        # a block whose shapes met no hit at all, while the shapes level already holds a block's
        # worth, is not remembered by shape: every message in it is one of a kind (an id or a
        # session key in each), and would only push out entries that are hit
        if cache.emptied == emptied and (len(miss) < len(idxs) or len(cache.shapes) < len(miss)):
            cache.remember(cache.shapes, missed, found)

    def add_event(self, event: str, count: int = 1) -> int:
        """Template index for a structured event type (no masking, no merging), counted ``count``
        times."""
        idx = self._events.get(event)
        if idx is None:
            idx = self._new(f"event:{event}", [event], (), structured=True)
            self._events[event] = idx
        self.templates[idx].count += count
        return idx

    def freeze(self) -> None:
        """From now on baseline templates never change; new ones are marked unseen."""
        self.frozen = True
        self.n_seen = len(self.templates)
        self.cache.clear()  # as a baseline loaded from disk starts: no memory of the fit

    def note_severity(self, idxs: list[int], levels: list[str | None]) -> None:
        """Keep, for every template made after the freeze, the worst level of its records."""
        n_seen = self.n_seen
        if not self.frozen or not idxs or max(idxs) < n_seen:
            return
        for idx, level in zip(idxs, levels):
            if idx >= n_seen and level:
                tpl = self.templates[idx]
                tpl.severity = max(tpl.severity, severity(level))

    def text(self, idx: int) -> str:
        return self.templates[idx].text

    def is_seen(self, idx: int) -> bool:
        return idx < self.n_seen or not self.frozen

    # -- the prefix tree --------------------------------------------------------
    def _route(self, tokens: list[str], create: bool) -> tuple[list[int] | None, tuple[str, ...]]:
        node = self._tree.setdefault(len(tokens), {}) if create else self._tree.get(len(tokens))
        path: list[str] = []
        for token in tokens[: self.routing_tokens]:
            if node is None:
                return None, ()
            # a token with a digit or a variable, or one in brackets (a field: "(alice)", "[main]"),
            # routes as a variable; the leaf's comparison tells such templates apart
            key = token if _DIGITS.isdisjoint(token) and WILDCARD not in token and token[:1] not in _OPENING else WILDCARD
            if key not in node:
                if not create:
                    key = WILDCARD
                elif len(node) >= self.max_branches:
                    key = WILDCARD
            path.append(key)
            nxt = node.get(key)
            if nxt is None:
                if not create:
                    return None, ()
                nxt = node[key] = {}
            node = nxt
        leaf = node.get("") if node is not None else None
        if leaf is None and create:
            leaf = node[""] = []
        return leaf, tuple(path)

    def _add_masked(self, masked: str) -> int:
        key = _masked_key(masked)
        idx = self.cache.masked.get(key)
        if idx is not None:
            return idx
        tokens = masked.split(" ") if masked else [""]
        leaf, path = self._route(tokens, create=True)
        best, best_sim, best_wild = None, -1.0, -1
        for cand in leaf:
            tpl = self.templates[cand]
            same = wild = 0
            for a, b in zip(tpl.tokens, tokens):
                if a == WILDCARD or (a != b and (_covers(a, b) or _covers(b, a))):
                    wild += 1
                elif a == b or _alike(a, b):
                    same += 1
            held = len(tokens) - wild  # the positions where both hold a constant
            sim = same / held if held else 1.0
            if sim > best_sim or (sim == best_sim and wild > best_wild):
                best, best_sim, best_wild = cand, sim, wild
        if best is None or best_sim < self.join_share:
            best, best_sim = self._compatible(tokens), self.join_share
        if best is not None and best_sim >= self.join_share:
            tpl = self.templates[best]
            if not (self.frozen and best < self.n_seen):
                tpl.tokens = list(map(_generalise, tpl.tokens, tokens))
            idx = best
        else:
            idx = self._new(key, tokens, path)  # the id: a hash of the key, whichever name came first
            leaf.append(idx)
        self.cache.remember_masked(key, idx)
        return idx

    def _compatible(self, tokens: list[str]) -> int | None:
        """The merge step: the first template of this length, on any route, that differs from
        the message only where one of the two has a variable (``[main]`` and ``[<var>]`` as the
        thread of one log statement), if any; a frozen baseline's templates only where their
        own variables cover the message."""
        for cand in self._by_length.get(len(tokens), ()):
            tpl = self.templates[cand]
            keep = self.frozen and cand < self.n_seen
            if all(a == b or _covers(a, b) or (not keep and _covers(b, a)) or _alike(a, b)
                   for a, b in zip(tpl.tokens, tokens)):
                return cand
        return None

    def _new(self, seed: str, tokens: list[str], path: tuple[str, ...], structured: bool = False) -> int:
        tid = _stable_id(seed)
        while tid in self._ids:  # astronomically rare; keep ids unique and deterministic
            seed += "'"
            tid = _stable_id(seed)
        idx = len(self.templates)
        self.templates.append(Template(tid, idx, list(tokens), path, 0, structured, not self.frozen))
        self._ids[tid] = idx
        if not structured:
            self._by_length.setdefault(len(tokens), []).append(idx)
        return idx

    # -- persistence ------------------------------------------------------------
    @staticmethod
    def _entry(t: Template) -> dict:
        return {"id": t.id, "template": t.text, "tokens": t.tokens, "path": list(t.path),
                "count": t.count, "structured": t.structured}

    def to_dict(self) -> dict:
        return {
            "routing_tokens": self.routing_tokens,
            "join_share": self.join_share,
            "max_branches": self.max_branches,
            "templates": [self._entry(t) for t in self.templates],
        }

    def _insert(self, entry: dict, seen: bool = True) -> None:
        tokens = list(entry["tokens"])
        idx = len(self.templates)
        tpl = Template(entry["id"], idx, tokens, tuple(entry["path"]), int(entry["count"]),
                       bool(entry["structured"]), seen, int(entry.get("severity", 0)))
        self.templates.append(tpl)
        self._ids[tpl.id] = idx
        if tpl.structured:
            self._events[tokens[0]] = idx
            return
        self._by_length.setdefault(len(tokens), []).append(idx)
        node = self._tree.setdefault(len(tokens), {})
        for key in tpl.path:
            node = node.setdefault(key, {})
        node.setdefault("", []).append(idx)

    @classmethod
    def from_dict(cls, data: dict) -> "TemplateTree":
        miner = cls(data["routing_tokens"], data["join_share"], data["max_branches"])
        for entry in data["templates"]:
            miner._insert(entry)
        return miner

    # -- live state (daemon checkpoints and baseline switches) ----------------------
    def learned_state(self) -> dict:
        """What a frozen miner learned since its baseline was fitted — templates created after
        the freeze and which template each masked message went to — so that a restarted
        daemon maps every later message exactly as it would have without the restart."""
        return {"n_seen": self.n_seen,
                "templates": [{**self._entry(t), "severity": t.severity} for t in self.templates[self.n_seen:]],
                "masked": list(self.cache.masked.items())}

    def restore_learned(self, state: dict) -> None:
        """Put back :meth:`learned_state` on a freshly loaded copy of the same baseline."""
        if not self.frozen or state["n_seen"] != self.n_seen or len(self.templates) != self.n_seen:
            raise ValueError("the learned templates belong to another baseline")
        for entry in state["templates"]:
            self._insert(entry, seen=False)
        n = len(self.templates)
        for masked, idx in state["masked"]:
            if not 0 <= idx < n:
                raise ValueError(f"template index {idx} out of range")
            self.cache.remember_masked(masked, idx)

    def adopt(self, other: "TemplateTree") -> list[int]:
        """This miner's index for every template of ``other``: the template with the same id,
        else the one its text mines to (a new, unseen template if need be). Used to carry open
        sessions over to a newly loaded baseline."""
        out = []
        for t in other.templates:
            idx = self._ids.get(t.id)
            if idx is None:
                idx = self.add_event(t.tokens[0]) if t.structured else self._add_masked(t.text)
            out.append(idx)
        return out
