"""A vessel's live state to bytes and back, bit for bit, without pickle.

A worker of the NATS engine (:mod:`monitor.engine.worker`) saves each vessel's
processing state (its :class:`~monitor.runs.live.LiveVessel`: the assembler, the run
feed, the open run with its filter and heat-up fit, the drift trackers) with the
stream sequence it covers, and a worker that takes the partition over loads it and
carries on. The bytes come back from the network, so they are read by a decoder that
builds only what it is allowed to build:

* JSON values for ``None``, ``bool``, ``int`` and ``str``;
* floats as the hex of their IEEE 754 binary64 bytes (``struct``), so every bit comes
  back, NaN payloads and the sign of zero included;
* ``list``, ``tuple``, ``dict`` (any keys), ``set``, ``frozenset``, ``deque`` (with its
  ``maxlen``) and ``Counter``;
* numpy arrays (dtype, shape and the raw bytes in base64; object arrays refused) and
  numpy scalars;
* instances of the classes of our own packages (``monitor``, ``drivers``): their
  ``__dict__`` and ``__slots__`` attributes, restored without calling ``__init__``;
  enums of those packages by value; references to those classes themselves.

Objects reached twice are written once and referred to after (so shared parts stay
shared and cycles are kept). The walk is generic: an attribute added to one of our
classes later is saved and restored with the rest, without a change here. Anything
else (a function, a lock, a file, another library's object) is refused with
:class:`CheckpointError`, naming where in the state it sits, rather than left out.

The stored form is ``zlib`` over UTF-8 JSON: ``{"format": FORMAT, "version": VERSION,
"state": <tree>}``; docs/engine.md describes the tree.
"""

from __future__ import annotations

import base64
import collections
import enum
import importlib
import json
import struct
import zlib
from typing import Any

import numpy as np

from drivers.errors import EbullioError

__all__ = ["FORMAT", "OWN_PACKAGES", "VERSION", "CheckpointError", "dumps", "loads"]

#: The name in every checkpoint's header.
FORMAT = "ebullio-checkpoint"
#: The tree's version; a reader refuses another.
VERSION = 1
#: The packages whose classes a checkpoint may hold.
OWN_PACKAGES = ("monitor", "drivers")

_DOUBLE = struct.Struct("<d")


class CheckpointError(EbullioError, ValueError):
    """A state that cannot be saved, or bytes that are not a checkpoint we can read."""


def _own(cls: type) -> bool:
    return cls.__module__.split(".")[0] in OWN_PACKAGES


def _class_name(cls: type) -> str:
    return f"{cls.__module__}:{cls.__qualname__}"


def _find_class(name: object) -> type:
    """Return one of our own classes by ``module:qualname``; refuse anything else."""
    if not isinstance(name, str) or name.count(":") != 1:
        raise CheckpointError(f"class name {name!r} is not module:qualname")
    module_name, qualname = name.split(":")
    if module_name.split(".")[0] not in OWN_PACKAGES:
        raise CheckpointError(f"class {name!r} is not one of ebullio's own")
    try:
        target: object = importlib.import_module(module_name)
        for part in qualname.split("."):
            target = getattr(target, part)
    except (ImportError, AttributeError):
        raise CheckpointError(f"class {name!r} does not exist in this version") from None
    if not isinstance(target, type) or not _own(target):
        raise CheckpointError(f"{name!r} is not a class of ebullio's own")
    return target


def _slot_names(cls: type) -> list[str]:
    names: list[str] = []
    for base in cls.__mro__:
        slots = base.__dict__.get("__slots__", ())
        for slot in (slots,) if isinstance(slots, str) else slots:
            if slot not in ("__dict__", "__weakref__") and slot not in names:
                names.append(slot)
    return names


class _Encoder:
    def __init__(self) -> None:
        self.refs: dict[int, int] = {}  # id(obj) -> its number in the tree
        self.keep: list[object] = []  # the objects numbered, alive until the end

    def number(self, obj: object) -> int:
        n = len(self.keep)
        self.refs[id(obj)] = n
        self.keep.append(obj)
        return n

    def encode(self, obj: Any, where: str) -> Any:
        if obj is None or obj is True or obj is False or type(obj) is str:
            return obj
        if type(obj) is int:
            return obj
        if type(obj) is float:
            return ["f", _DOUBLE.pack(obj).hex()]
        seen = self.refs.get(id(obj))
        if seen is not None:
            return ["r", seen]
        cls = type(obj)
        if isinstance(obj, enum.Enum):
            if not _own(cls):
                raise CheckpointError(f"{where}: enum {_class_name(cls)} is not ebullio's own")
            return ["e", _class_name(cls), self.encode(obj.value, where)]
        if isinstance(obj, type):
            if not _own(obj):
                raise CheckpointError(f"{where}: class {_class_name(obj)} is not ebullio's own")
            return ["c", _class_name(obj)]
        if cls is np.ndarray:
            if obj.dtype.hasobject:
                raise CheckpointError(f"{where}: a numpy array of Python objects")
            n = self.number(obj)
            data = base64.b64encode(np.ascontiguousarray(obj).tobytes()).decode("ascii")
            return ["a", n, obj.dtype.str, list(obj.shape), data]
        if isinstance(obj, np.generic) and cls.__module__ == "numpy":
            if obj.dtype.hasobject:
                raise CheckpointError(f"{where}: a numpy object scalar")
            return ["g", obj.dtype.str, base64.b64encode(obj.tobytes()).decode("ascii")]
        if cls is tuple:
            return ["t", [self.encode(v, f"{where}[{i}]") for i, v in enumerate(obj)]]
        if cls is frozenset:
            return ["z", [self.encode(v, f"{where}{{}}") for v in obj]]
        if cls is list:
            n = self.number(obj)
            return ["l", n, [self.encode(v, f"{where}[{i}]") for i, v in enumerate(obj)]]
        if cls is set:
            n = self.number(obj)
            return ["s", n, [self.encode(v, f"{where}{{}}") for v in obj]]
        if cls is dict or cls is collections.Counter:
            n = self.number(obj)
            pairs = [[self.encode(k, where), self.encode(v, f"{where}[{k!r}]")]
                     for k, v in obj.items()]  # fmt: skip
            return ["d" if cls is dict else "k", n, pairs]
        if cls is collections.deque:
            n = self.number(obj)
            items = [self.encode(v, f"{where}[{i}]") for i, v in enumerate(obj)]
            return ["q", n, obj.maxlen, items]
        if _own(cls) and not callable(obj):
            n = self.number(obj)
            attrs = dict(getattr(obj, "__dict__", {}))
            for slot in _slot_names(cls):
                if hasattr(obj, slot):
                    attrs[slot] = getattr(obj, slot)
            pairs = [[k, self.encode(v, f"{where}.{k}")] for k, v in attrs.items()]
            return ["o", n, _class_name(cls), pairs]
        raise CheckpointError(
            f"{where}: cannot save a {cls.__module__}.{cls.__qualname__} "
            "(only plain data, numpy arrays and ebullio's own classes)"
        )


class _Decoder:
    def __init__(self) -> None:
        self.objects: dict[int, object] = {}

    def keep(self, n: object, obj: object) -> None:
        if type(n) is not int or n in self.objects:
            raise CheckpointError(f"bad object number {n!r}")
        self.objects[n] = obj

    def decode(self, node: Any) -> Any:
        if node is None or type(node) in (bool, int, str):
            return node
        if type(node) is not list or not node or type(node[0]) is not str:
            raise CheckpointError(f"unreadable node {str(node)[:60]!r}")
        tag, *rest = node
        try:
            return self._decode(tag, rest)
        except (TypeError, ValueError, IndexError, KeyError) as exc:
            if isinstance(exc, CheckpointError):
                raise
            raise CheckpointError(f"unreadable {tag!r} node: {exc}") from None

    def _decode(self, tag: str, rest: list[Any]) -> Any:
        if tag == "f":
            return _DOUBLE.unpack(bytes.fromhex(rest[0]))[0]
        if tag == "r":
            if rest[0] not in self.objects:
                raise CheckpointError(f"reference to object {rest[0]!r} before it")
            return self.objects[rest[0]]
        if tag == "e":
            cls = _find_class(rest[0])
            if not issubclass(cls, enum.Enum):
                raise CheckpointError(f"{rest[0]!r} is not an enum")
            return cls(self.decode(rest[1]))
        if tag == "c":
            return _find_class(rest[0])
        if tag == "a":
            n, dtype_str, shape, data = rest
            dtype = np.dtype(dtype_str)
            if dtype.hasobject:
                raise CheckpointError("a numpy array of Python objects")
            array = np.frombuffer(base64.b64decode(data, validate=True), dtype=dtype)
            array = array.reshape([int(s) for s in shape]).copy()
            self.keep(n, array)
            return array
        if tag == "g":
            dtype = np.dtype(rest[0])
            if dtype.hasobject:
                raise CheckpointError("a numpy object scalar")
            return np.frombuffer(base64.b64decode(rest[1], validate=True), dtype=dtype)[0]
        if tag == "t":
            return tuple(self.decode(v) for v in rest[0])
        if tag == "z":
            return frozenset(self.decode(v) for v in rest[0])
        if tag == "l":
            out: list[Any] = []
            self.keep(rest[0], out)
            out.extend(self.decode(v) for v in rest[1])
            return out
        if tag == "s":
            items: set[Any] = set()
            self.keep(rest[0], items)
            items.update(self.decode(v) for v in rest[1])
            return items
        if tag in ("d", "k"):
            mapping: dict[Any, Any] = {} if tag == "d" else collections.Counter()
            self.keep(rest[0], mapping)
            for key, value in rest[1]:
                mapping[self.decode(key)] = self.decode(value)
            return mapping
        if tag == "q":
            n, maxlen, values = rest
            if maxlen is not None and type(maxlen) is not int:
                raise CheckpointError(f"deque maxlen {maxlen!r}")
            queue: collections.deque[Any] = collections.deque(maxlen=maxlen)
            self.keep(n, queue)
            queue.extend(self.decode(v) for v in values)
            return queue
        if tag == "o":
            n, name, pairs = rest
            cls = _find_class(name)
            if issubclass(cls, enum.Enum):
                raise CheckpointError(f"{name!r} is an enum, not an object")
            obj = object.__new__(cls)
            self.keep(n, obj)
            for attr, value in pairs:
                if type(attr) is not str or not attr.isidentifier():
                    raise CheckpointError(f"attribute name {attr!r} of {name}")
                object.__setattr__(obj, attr, self.decode(value))
            return obj
        raise CheckpointError(f"unknown node tag {tag!r}")


def dumps(state: object) -> bytes:
    """Return ``state`` as checkpoint bytes (zlib over JSON); CheckpointError when some
    part of it is not data this module may save (the message says where)."""
    tree = _Encoder().encode(state, "state")
    text = json.dumps({"format": FORMAT, "version": VERSION, "state": tree},
                      separators=(",", ":"), allow_nan=False)  # fmt: skip
    return zlib.compress(text.encode("utf-8"), 6)


#: The largest checkpoint (bytes, decompressed) a reader accepts.
MAX_CHECKPOINT_BYTES = 256 * 1024 * 1024


def loads(data: bytes) -> Any:
    """Return the state saved by :func:`dumps`; CheckpointError for anything else."""
    try:
        inflate = zlib.decompressobj()
        text = inflate.decompress(data, MAX_CHECKPOINT_BYTES)
        if inflate.unconsumed_tail:
            raise CheckpointError(f"checkpoint over {MAX_CHECKPOINT_BYTES} bytes")
        document = json.loads(text.decode("utf-8"))
    except (zlib.error, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise CheckpointError(f"not a checkpoint: {exc}") from None
    if not isinstance(document, dict) or document.get("format") != FORMAT:
        raise CheckpointError("not an ebullio checkpoint")
    if document.get("version") != VERSION:
        raise CheckpointError(f"checkpoint version {document.get('version')!r}, not {VERSION}")
    return _Decoder().decode(document.get("state"))
