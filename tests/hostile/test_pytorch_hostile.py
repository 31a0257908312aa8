"""Hostile PyTorch checkpoints: small files that claim much, and pickles that make work.

Every case is generated here, into ``tmp_path``, and run through the real CLI in a child
process (``harness.run``: 4 GiB address cap, own peak RSS, wall time). The promise checked is
the issue's: exit 2 with one ``steelyard: ...`` line (or a clean result for a valid but
hostile file), no traceback, under 20 s and 1 GiB.

How the files are built (sources beside each writer): a PyTorch zip checkpoint is a zip with
``<name>/data.pkl`` (a protocol-2 pickle), ``<name>/data/<key>`` (raw storage bytes) and
``<name>/version`` (the layout torch.save writes; torch/serialization.py). Pickles are written
opcode by opcode (the opcodes are documented in CPython's ``pickletools``); zips by hand from
the PKWARE APPNOTE layout (4.3: local headers, central directory, end record), so that a
member of hundreds of MB of zeros costs a few hundred KB of deflate and no RAM to write.
"""

from __future__ import annotations

import struct
import zlib
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.hostile.harness import Outcome, assert_bounded, assert_refused, run

_MIB = 2**20
_ZERO_BLOCK = bytes(_MIB)

# --------------------------------------------------------------------------------------------
# Pickle opcodes (CPython pickletools; protocol 2 is what torch.save writes by default)

PROTO2 = b"\x80\x02"
STOP = b"."
MARK = b"("
EMPTY_DICT = b"}"
EMPTY_LIST = b"]"
EMPTY_TUPLE = b")"
SETITEMS = b"u"
SETITEM = b"s"
APPENDS = b"e"
TUPLE = b"t"
TUPLE2 = b"\x86"
REDUCE = b"R"
NONE = b"N"
NEWFALSE = b"\x89"
POP = b"0"
BINPERSID = b"Q"


def s(text: str) -> bytes:
    """BINUNICODE."""
    raw = text.encode()
    return b"X" + struct.pack("<I", len(raw)) + raw


def i(value: int) -> bytes:
    """BININT (4-byte signed) or LONG1 for larger integers."""
    if -(2**31) <= value < 2**31:
        return b"J" + struct.pack("<i", value)
    raw = value.to_bytes((value.bit_length() + 8) // 8, "little", signed=True)
    if len(raw) < 256:
        return b"\x8a" + bytes([len(raw)]) + raw  # LONG1
    return b"\x8b" + struct.pack("<i", len(raw)) + raw  # LONG4


def put(index: int) -> bytes:
    """LONG_BINPUT: remember the top of the stack under ``index``."""
    return b"r" + struct.pack("<I", index)


def get(index: int) -> bytes:
    """LONG_BINGET: push the object remembered under ``index``."""
    return b"j" + struct.pack("<I", index)


def glob(module: str, name: str) -> bytes:
    """GLOBAL."""
    return b"c" + module.encode() + b"\n" + name.encode() + b"\n"


def ints(values: tuple[int, ...]) -> bytes:
    return MARK + b"".join(i(v) for v in values) + TUPLE


def tensor(
    key: str,
    numel: int,
    size: tuple[int, ...],
    stride: tuple[int, ...],
    offset: int = 0,
    storage: str = "FloatStorage",
) -> bytes:
    """``torch._utils._rebuild_tensor_v2(storage, offset, size, stride, False, OrderedDict())``
    with the storage as the persistent id ``('storage', torch.<storage>, key, 'cpu', numel)``,
    as torch.save writes a tensor (torch/_tensor.py ``__reduce_ex__``)."""
    pid = MARK + s("storage") + glob("torch", storage) + s(key) + s("cpu") + i(numel) + TUPLE
    args = (
        MARK
        + pid
        + BINPERSID
        + i(offset)
        + ints(size)
        + ints(stride)
        + NEWFALSE
        + glob("collections", "OrderedDict")
        + EMPTY_TUPLE
        + REDUCE
        + TUPLE
    )
    return glob("torch._utils", "_rebuild_tensor_v2") + args + REDUCE


def state_dict(entries: dict[str, bytes]) -> bytes:
    """``{name: <opcodes>}`` as one pickle of a plain dict."""
    body = b"".join(s(name) + value for name, value in entries.items())
    return PROTO2 + EMPTY_DICT + MARK + body + SETITEMS + STOP


# --------------------------------------------------------------------------------------------
# Zip writer (PKWARE APPNOTE 4.3), stored or raw-deflated (RFC 1951) members


def _deflate_zeros(nbytes: int) -> Iterator[bytes]:
    """Raw deflate of ``nbytes`` zeros: full-flushing after every 1 MiB resets the window, so
    each 1 MiB compresses to the same ~1 KB, compressed once and repeated."""
    compressor = zlib.compressobj(9, zlib.DEFLATED, -15)
    block = compressor.compress(_ZERO_BLOCK) + compressor.flush(zlib.Z_FULL_FLUSH)
    whole, rest = divmod(nbytes, _MIB)
    for _ in range(whole):
        yield block
    yield compressor.compress(bytes(rest)) + compressor.flush(zlib.Z_FINISH)


def _crc_zeros(nbytes: int) -> int:
    crc = 0
    whole, rest = divmod(nbytes, _MIB)
    for _ in range(whole):
        crc = zlib.crc32(_ZERO_BLOCK, crc)
    return zlib.crc32(bytes(rest), crc)


class Zeros:
    """A member of ``nbytes`` zeros, deflated; ``crc=False`` writes a wrong CRC (cheap to
    write; only a reader that inflates to the end can notice)."""

    def __init__(self, nbytes: int, crc: bool = True) -> None:
        self.nbytes = nbytes
        self.crc = crc


def write_zip(
    path: Path, members: dict[str, bytes | Zeros], deflate: frozenset[str] = frozenset()
) -> Path:
    """Members given as bytes are stored (or deflated when named in ``deflate``)."""
    central = b""
    count = 0
    with open(path, "wb") as out:
        for name, content in members.items():
            raw_name = name.encode()
            offset = out.tell()
            if isinstance(content, Zeros):
                method, size = 8, content.nbytes
                crc = _crc_zeros(size) if content.crc else 0
                body: Iterator[bytes] = _deflate_zeros(size)
            elif name in deflate:
                method, size, crc = 8, len(content), zlib.crc32(content)
                compressor = zlib.compressobj(9, zlib.DEFLATED, -15)
                body = iter([compressor.compress(content) + compressor.flush()])
            else:
                method, size, crc = 0, len(content), zlib.crc32(content)
                body = iter([content])
            out.write(b"\0" * (30 + len(raw_name)))
            compressed = 0
            for piece in body:
                out.write(piece)
                compressed += len(piece)
            end = out.tell()
            out.seek(offset)
            out.write(
                struct.pack(
                    "<IHHHHHIIIHH",
                    0x04034B50,
                    20,
                    0,
                    method,
                    0,
                    0,
                    crc,
                    compressed,
                    size,
                    len(raw_name),
                    0,
                )
                + raw_name
            )
            out.seek(end)
            central += (
                struct.pack(
                    "<IHHHHHHIIIHHHHHII",
                    0x02014B50,
                    20,
                    20,
                    0,
                    method,
                    0,
                    0,
                    crc,
                    compressed,
                    size,
                    len(raw_name),
                    0,
                    0,
                    0,
                    0,
                    0,
                    offset,
                )
                + raw_name
            )
            count += 1
        start = out.tell()
        out.write(central)
        out.write(struct.pack("<IHHHHIIH", 0x06054B50, 0, 0, count, count, len(central), start, 0))
    return path


def checkpoint(
    path: Path,
    data_pkl: bytes,
    storages: dict[str, bytes | Zeros] | None = None,
    deflate_pickle: bool = False,
) -> Path:
    """A torch.save-shaped zip: archive/data.pkl, archive/byteorder, archive/data/<key>,
    archive/version."""
    members: dict[str, bytes | Zeros] = {
        "archive/data.pkl": data_pkl,
        "archive/byteorder": b"little",
    }
    for key, blob in (storages or {}).items():
        members[f"archive/data/{key}"] = blob
    members["archive/version"] = b"3\n"
    return write_zip(
        path, members, frozenset({"archive/data.pkl"}) if deflate_pickle else frozenset()
    )


def audit(path: Path) -> Outcome:
    return run(["audit", str(path)], path.parent)


def test_generated_checkpoint_is_read(tmp_path: Path) -> None:
    # The writers are sound: an honest small checkpoint (stored and deflated storages) audits.
    data = state_dict(
        {
            "fc.weight": tensor("0", 64, (8, 8), (8, 1)),
            "fc.bias": tensor("1", 8, (8,), (1,)),
        }
    )
    path = checkpoint(
        tmp_path / "ok.pt",
        data,
        {"0": bytes(range(256)), "1": Zeros(32)},
        deflate_pickle=True,
    )
    outcome = run(["layers", str(path)], tmp_path)
    assert_bounded(outcome)
    assert outcome.code == 0, outcome.stderr
    assert "fc" in outcome.stdout


# --------------------------------------------------------------------------------------------
# Compressed storages: inflated bytes are budgeted before inflating, and inflated once


@pytest.mark.parametrize(
    "claims",
    [
        [2**30],  # one member of 1 GiB: beyond the 512 MiB per-object budget
        [600 * _MIB, 16],  # beyond it by a little, beside an honest member
        [400 * _MIB] * 6,  # each within it, together beyond the 2 GiB checkpoint budget
    ],
    ids=["one-gib", "600-mib", "six-400-mib"],
)
def test_inflated_storages_beyond_the_budget_are_refused_before_inflating(
    tmp_path: Path, claims: list[int]
) -> None:
    entries = {
        f"layer{n}.weight": tensor(str(n), c // 4, (c // 4,), (1,)) for n, c in enumerate(claims)
    }
    # A wrong CRC costs nothing to write; only a reader that inflates everything notices it.
    storages: dict[str, bytes | Zeros] = {str(n): Zeros(c, crc=False) for n, c in enumerate(claims)}
    path = checkpoint(tmp_path / "bomb.pt", state_dict(entries), storages)
    assert path.stat().st_size < 3 * _MIB
    assert_refused(audit(path), "budget")


@pytest.mark.parametrize("views", [96, 160])
def test_a_deflated_storage_read_by_many_tensors_is_inflated_once(
    tmp_path: Path, views: int
) -> None:
    # 192 MiB of zeros (within every budget) viewed by many small tensors: inflating it per
    # read costs views x 192 MiB of work; once per run, one inflation.
    numel = 48 * _MIB
    step = numel // views
    entries = {
        f"block{n}.weight": tensor("0", numel, (4, 4), (4, 1), offset=n * step)
        for n in range(views)
    }
    path = checkpoint(tmp_path / "shared.pt", state_dict(entries), {"0": Zeros(4 * numel)})
    outcome = audit(path)
    assert_bounded(outcome)
    assert outcome.code in (0, 1), outcome.stderr[-2000:]  # a clean result: findings or none


# --------------------------------------------------------------------------------------------
# Views: claimed size against the storage's bytes; zero-element tensors with huge dimensions


@pytest.mark.parametrize(
    ("size", "stride", "numel"),
    [
        ((2**20, 2**20), (0, 0), 1),  # 2^40 elements of one float
        ((2**16, 2**16), (0, 0), 1),  # 2^32 elements: within the element budget, 16 GiB
        ((2**28,), (0,), 4),  # 1 GiB broadcast from 16 bytes
        ((2**15, 2**16), (1, 1), 2**16 + 2**15),  # overlapping rows: 8 GiB from 384 KiB
    ],
    ids=["tera", "sixteen-gib", "one-gib", "overlap"],
)
def test_views_claiming_far_more_than_their_storage_are_refused(
    tmp_path: Path, size: tuple[int, ...], stride: tuple[int, ...], numel: int
) -> None:
    entries = {"fc.weight": tensor("0", numel, size, stride)}
    path = checkpoint(tmp_path / "view.pt", state_dict(entries), {"0": bytes(4 * numel)})
    assert_refused(audit(path), "fc.weight")


@pytest.mark.parametrize("size", [(2**40, 0), (2**30, 0, 3), (0, 2**40)])
def test_zero_element_tensors_claiming_huge_dimensions_are_refused(
    tmp_path: Path, size: tuple[int, ...]
) -> None:
    entries = {"fc.weight": tensor("0", 0, size, tuple(1 for _ in size))}
    path = checkpoint(tmp_path / "empty.pt", state_dict(entries), {"0": b""})
    assert_refused(audit(path), "fc.weight")


# --------------------------------------------------------------------------------------------
# CPU: memo-shared structures walked once, flat tuples measured once, pickle size capped


def _shared_dicts(depth: int) -> bytes:
    """d0 = {'weight': t}; d(k) = {'weight': t, 'a': d(k-1), 'b': d(k-1)}: 2^depth paths to one
    tensor, in a pickle linear in depth (each dict is memoised once and referred to)."""
    out = EMPTY_DICT + s("weight") + tensor("0", 4, (2, 2), (2, 1)) + put(999) + SETITEM
    out += put(0)
    for level in range(1, depth + 1):
        # Each level also holds a tensor, so every level is a dict of tensors to descend into.
        out += POP + EMPTY_DICT + MARK + s("weight") + get(999) + s("bias") + get(999)
        out += s("a") + get(level - 1) + s("b") + get(level - 1) + SETITEMS + put(level)
    return out


@pytest.mark.parametrize("depth", [30, 48])
def test_memo_shared_dicts_in_a_state_dict_are_walked_once(tmp_path: Path, depth: int) -> None:
    data = PROTO2 + EMPTY_DICT + s("state_dict") + _shared_dicts(depth) + SETITEM + STOP
    path = checkpoint(tmp_path / "shared.pt", data, {"0": bytes(16)})
    outcome = audit(path)
    assert_bounded(outcome)
    assert outcome.code in (0, 1), outcome.stderr[-2000:]


@pytest.mark.parametrize("entries", [3000, 6000])
def test_one_state_dict_shared_by_many_entries_is_gathered_once(
    tmp_path: Path, entries: int
) -> None:
    # inner = {'w<i>': <one memoised tensor>} x entries; root = {'part<j>': inner} x entries:
    # gathered naively, entries^2 names.
    inner = EMPTY_DICT + MARK + s("w0") + tensor("0", 4, (2, 2), (2, 1)) + put(0)
    inner += b"".join(s(f"w{n}") + get(0) for n in range(1, entries)) + SETITEMS + put(1)
    root = EMPTY_DICT + MARK + s("part0") + inner
    root += b"".join(s(f"part{n}") + get(1) for n in range(1, entries)) + SETITEMS
    path = checkpoint(tmp_path / "parts.pt", PROTO2 + root + STOP, {"0": bytes(16)})
    outcome = audit(path)
    assert_bounded(outcome)
    assert outcome.code in (0, 1), outcome.stderr[-2000:]


@pytest.mark.parametrize("width", [200_000, 300_000])
def test_a_flat_tuple_referred_to_many_times_is_measured_once(tmp_path: Path, width: int) -> None:
    flat = MARK + NONE * width + TUPLE + put(0)
    refs = MARK + get(0) * width + TUPLE
    data = PROTO2 + EMPTY_DICT + MARK + s("x") + flat + s("y") + refs + SETITEMS + STOP
    path = checkpoint(tmp_path / "tuples.pt", data)
    # Refused from the cached measurements (linear), before anything hashes the big tuple.
    assert_refused(audit(path), "tuple")


@pytest.mark.parametrize("depth", [40, 60])
def test_a_tuple_dag_used_as_a_key_is_refused(tmp_path: Path, depth: int) -> None:
    # t(k) = (t(k-1), t(k-1)): hashing it (a dict key) visits 2^depth tuples.
    dag = NONE + put(0)
    for level in range(1, depth + 1):
        dag += POP + get(level - 1) + get(level - 1) + TUPLE2 + put(level)
    data = PROTO2 + EMPTY_DICT + dag + NONE + SETITEM + STOP
    path = checkpoint(tmp_path / "dag.pt", data)
    assert_refused(audit(path), "tuple")


@pytest.mark.parametrize(("items", "calls"), [(200_000, 3000), (50_000, 20_000)])
def test_a_shared_list_copied_by_many_calls_is_refused(
    tmp_path: Path, items: int, calls: int
) -> None:
    # builtins.set(L) for one memoised list L, many times: each call copies all of L.
    big = EMPTY_LIST + MARK + b"".join(i(n) for n in range(items)) + APPENDS + put(0)
    make = glob("builtins", "set") + put(1)
    calls_ops = EMPTY_LIST + MARK + make + get(0) + b"\x85" + REDUCE  # TUPLE1
    calls_ops += (get(1) + get(0) + b"\x85" + REDUCE) * (calls - 1) + APPENDS
    data = PROTO2 + EMPTY_DICT + MARK + s("l") + big + s("sets") + calls_ops + SETITEMS + STOP
    path = checkpoint(tmp_path / "sets.pt", data)
    assert_refused(audit(path), "data.pkl")


@pytest.mark.parametrize(
    ("opcode", "megabytes"),
    [(NONE, 90), (EMPTY_DICT, 60), (MARK, 80)],
    ids=["none", "dict", "mark"],
)
def test_a_deflated_pickle_beyond_the_pickle_cap_is_refused_before_inflating(
    tmp_path: Path, opcode: bytes, megabytes: int
) -> None:
    data = PROTO2 + opcode * (megabytes * 10**6) + STOP
    path = checkpoint(tmp_path / "big.pt", data, deflate_pickle=True)
    assert path.stat().st_size < 2 * _MIB
    assert_refused(audit(path), "data.pkl")


@pytest.mark.parametrize(
    "opcode",
    [b"\x8f", MARK, EMPTY_DICT + b"\x94", EMPTY_LIST],  # EMPTY_SET, MARK, dict+MEMOIZE, list
    ids=["set", "mark", "dict-memo", "list"],
)
def test_a_pickle_of_millions_of_containers_is_refused(tmp_path: Path, opcode: bytes) -> None:
    data = PROTO2 + opcode * (7_500_000 // len(opcode)) + STOP
    path = checkpoint(tmp_path / "many.pt", data, deflate_pickle=True)
    assert_refused(audit(path), "data.pkl")


@pytest.mark.parametrize("repeats", [100_000, 300_000])
def test_a_prefix_repeated_many_times_is_stripped_in_linear_time(
    tmp_path: Path, repeats: int
) -> None:
    prefix = "module." * repeats
    entries = {
        f"{prefix}fc.weight": tensor("0", 4, (2, 2), (2, 1)),
        f"{prefix}fc.bias": tensor("1", 2, (2,), (1,)),
    }
    path = checkpoint(tmp_path / "prefix.pt", state_dict(entries), {"0": bytes(16), "1": bytes(8)})
    outcome = audit(path)
    assert_bounded(outcome)
    assert outcome.code in (0, 1), outcome.stderr[-2000:]
    assert len(outcome.stdout) < 100_000  # the prefix is not repeated back at the reader


def _optimizer(state: bytes, groups: bytes) -> bytes:
    return EMPTY_DICT + MARK + s("state") + state + s("param_groups") + groups + SETITEMS


def _training(optimizer: bytes) -> bytes:
    model = EMPTY_DICT + s("fc.weight") + tensor("0", 4, (2, 2), (2, 1)) + SETITEM
    return (
        PROTO2
        + EMPTY_DICT
        + MARK
        + s("model")
        + model
        + s("optimizer")
        + optimizer
        + SETITEMS
        + STOP
    )


@pytest.mark.parametrize("entries", [60_000, 100_000])
def test_optimizer_entries_sharing_one_dict_are_read_once(tmp_path: Path, entries: int) -> None:
    shared = EMPTY_DICT + MARK + b"".join(s(f"k{n}") + NONE for n in range(entries))
    shared += SETITEMS + put(0)
    state = EMPTY_DICT + MARK + i(0) + shared
    state += b"".join(i(n) + get(0) for n in range(1, entries)) + SETITEMS
    groups = EMPTY_LIST + EMPTY_DICT + s("params") + EMPTY_LIST + i(0) + b"a" + SETITEM + b"a"
    path = checkpoint(tmp_path / "optim.pt", _training(_optimizer(state, groups)), {"0": bytes(16)})
    outcome = audit(path)
    assert_bounded(outcome)
    assert outcome.code in (0, 1), outcome.stderr[-2000:]


def _list_dag(depth: int, first: int) -> bytes:
    """l(k) = [l(k-1), l(k-1)] in memo slots first..first+depth: equality of two such lists
    built separately compares 2^depth pairs."""
    out = NONE + put(first)
    for level in range(1, depth + 1):
        out += POP + EMPTY_LIST + MARK + get(first + level - 1) * 2 + APPENDS + put(first + level)
    return out


@pytest.mark.parametrize("depth", [36, 50])
def test_param_group_values_that_are_shared_lists_are_not_compared_deeply(
    tmp_path: Path, depth: int
) -> None:
    moments = EMPTY_DICT + MARK
    for slot in ("exp_avg", "exp_avg_sq"):
        moments += s(slot) + tensor("0", 4, (2, 2), (2, 1))
    state = EMPTY_DICT + i(0) + moments + SETITEMS + SETITEM
    group1 = EMPTY_DICT + MARK + s("params") + EMPTY_LIST + i(0) + b"a" + s("betas")
    group1 += _list_dag(depth, 0) + SETITEMS
    group2 = EMPTY_DICT + MARK + s("params") + EMPTY_LIST + s("betas")
    group2 += _list_dag(depth, depth + 1) + SETITEMS
    groups = EMPTY_LIST + MARK + group1 + group2 + APPENDS
    path = checkpoint(
        tmp_path / "groups.pt", _training(_optimizer(state, groups)), {"0": bytes(16)}
    )
    outcome = audit(path)
    assert_bounded(outcome)
    assert outcome.code in (0, 1), outcome.stderr[-2000:]


def test_a_huge_integer_parameter_id_is_reported_in_one_line(tmp_path: Path) -> None:
    # An integer of 5,000 digits: Python refuses to print it (sys.int_max_str_digits).
    state = EMPTY_DICT + i(10**5000) + EMPTY_DICT + SETITEM
    groups = EMPTY_LIST + EMPTY_DICT + s("params") + EMPTY_LIST + i(0) + b"a" + SETITEM + b"a"
    path = checkpoint(tmp_path / "bigid.pt", _training(_optimizer(state, groups)), {"0": bytes(16)})
    outcome = audit(path)
    assert_bounded(outcome)
    assert outcome.code in (0, 1), outcome.stderr[-2000:]


@pytest.mark.parametrize("count", [20_000, 40_000])
def test_torchscript_objects_times_declared_parameters_stay_linear(
    tmp_path: Path, count: int
) -> None:
    # One class declaring `count` parameters, `count` objects of it: checking every declared
    # parameter of every object is count^2.
    names = ", ".join(f'"p{n}"' for n in range(count))
    code = f"class M(Module):\n  __parameters__ = [{names}, ]\n".encode()
    cls = glob("__torch__", "M") + put(0)
    obj = EMPTY_TUPLE + b"\x81" + EMPTY_DICT + b"b"  # NEWOBJ, then BUILD with {}
    root_state = EMPTY_DICT + MARK + s("p0") + tensor("0", 4, (2, 2), (2, 1))
    root_state += s("c0") + cls + obj
    root_state += b"".join(s(f"c{n}") + get(0) + obj for n in range(1, count)) + SETITEMS
    data = PROTO2 + glob("__torch__", "M") + EMPTY_TUPLE + b"\x81" + root_state + b"b" + STOP
    members: dict[str, bytes | Zeros] = {
        "archive/data.pkl": data,
        "archive/code/__torch__.py": code,
        "archive/data/0": bytes(16),
        "archive/constants.pkl": PROTO2 + EMPTY_TUPLE + STOP,
        "archive/version": b"3\n",
    }
    path = write_zip(tmp_path / "script.pt", members)
    outcome = audit(path)
    assert_bounded(outcome)
    assert outcome.code in (0, 1), outcome.stderr[-2000:]
