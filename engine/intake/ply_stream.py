"""The body of a PLY file, streamed: read in chunks straight into the final arrays, written in chunks.

Reading holds one chunk of the file (``chunk_bytes``) besides the arrays it
fills: fixed-size records (every element without lists, and runs of list
records whose lists have one length, the usual faces) are viewed with a
structured dtype and copied column by column into their destinations; records
of mixed list lengths are walked one by one inside the chunk. Writing formats
one chunk of records at a time, so the file's bytes never exist whole.

Layout as described by Greg Turk, "The PLY Polygon File Format" (1994) (from
memory): the elements in header order, one record per element item; binary
scalars packed without padding in the declared byte order; a list is its count
followed by its items; ASCII values separated by whitespace.
"""

from __future__ import annotations

import struct
from collections.abc import Iterator, Sequence
from typing import IO, Any

import numpy as np
from numpy.typing import NDArray

__all__ = ["CHUNK_BYTES", "FormatError", "Element", "Plan", "BinaryBody", "AsciiBody", "binary_records",
           "ascii_records", "is_number"]

CHUNK_BYTES = 1 << 22  # 4 MiB of file per step
_RUN = 16      # a run of equal list lengths shorter than this is walked record by record
_WALK = 4096   # records walked one by one before a run is looked for again
_WINDOW = 64   # records of the first look for a run; then four times more each look
_WHITESPACE = b" \t\n\r\x0b\x0c"  # what bytes.split() splits on (Python documentation, from memory)

Columns = dict[str, Any]  # property name -> array, or (items, lengths) for lists


class FormatError(Exception):
    """A problem in a file's content; read_mesh adds the file name."""


class Element:
    """One ``element`` of a PLY header and its properties."""

    def __init__(self, name: str, count: int):
        self.name, self.count = name, count
        # (name, dtype string) for scalars, (name, item dtype string, count dtype string) for lists
        self.props: list[tuple[str, ...]] = []


def is_number(tok: bytes, kind: str) -> bool:
    try:
        float(tok) if kind == "f" else int(tok)
        return True
    except (ValueError, OverflowError):
        return False


class Plan:
    """Which properties of an element are kept and where they go.

    ``scalars`` maps a property's index to its output name and column (None
    for a one-dimensional output); ``arrays`` gives each output's width (None:
    one-dimensional) and dtype; ``lists`` are the indices of kept list
    properties. Arrays are allocated by :meth:`allocate`, after the reader
    checked that the file can hold the element.
    """

    def __init__(self) -> None:
        self.scalars: dict[int, tuple[str, int | None]] = {}
        self.arrays: dict[str, tuple[int | None, np.dtype[Any]]] = {}
        self.lists: set[int] = set()
        self.out: dict[str, NDArray[Any]] = {}
        self.sinks: dict[int, _ListSink] = {}

    def allocate(self, e: Element, guess: int) -> None:
        """The output arrays for ``e.count`` records; lists start with room for ``guess`` items."""
        n = e.count
        self.out = {name: np.empty(n if w is None else (n, w), dt) for name, (w, dt) in self.arrays.items()}
        self.sinks = {i: _ListSink(n, e.props[i][1], guess) for i in self.lists}

    def put(self, i: int, r: int, values: NDArray[Any]) -> None:
        """Values of scalar property ``i`` for records ``r, r + 1, ...`` (dropped when not kept)."""
        if i in self.scalars:
            name, col = self.scalars[i]
            if col is None:
                self.out[name][r:r + len(values)] = values
            else:
                self.out[name][r:r + len(values), col] = values

    def put_lists(self, i: int, r: int, items: NDArray[Any], lengths: NDArray[Any] | int) -> None:
        """Items of list property ``i`` for records from ``r``: (m, k) items of one length, or flat items
        and their lengths."""
        if i in self.sinks:
            self.sinks[i].add(r, items, lengths)

    def result(self, e: Element) -> Columns:
        out: Columns = dict(self.out)
        for i, sink in self.sinks.items():
            out[e.props[i][0]] = sink.result()
        return out


class _ListSink:
    """The items of one list property as they arrive: int64 for integer items, else the file's type."""

    def __init__(self, n: int, code: str, guess: int):
        dt = np.dtype(np.int64) if np.dtype(code).kind in "iu" else np.dtype(code)
        self.items = np.empty(max(guess, 0), dt)
        self.used = 0
        self.lengths = np.empty(n, np.int64)

    def add(self, r: int, items: NDArray[Any], lengths: NDArray[Any] | int) -> None:
        count = items.size
        need = self.used + count
        if need > len(self.items):  # more items than guessed: room for all records at this rate
            records = r + (len(items) if isinstance(lengths, int) else len(lengths))
            self.items.resize(max(need, need * len(self.lengths) // max(records, 1)), refcheck=False)
        dest = self.items[self.used:self.used + count]
        if isinstance(lengths, int):
            dest.reshape(items.shape)[...] = items
            self.lengths[r:r + len(items)] = lengths
        else:
            dest[...] = items
            self.lengths[r:r + len(lengths)] = lengths
        self.used += count

    def result(self) -> tuple[NDArray[Any], NDArray[Any]]:
        self.items.resize(self.used, refcheck=False)
        return self.items, self.lengths


def _truncated(e: Element, r: int) -> FormatError:
    return FormatError(f"truncated data in element {e.name!r} (record {r} of {e.count})")


# ---------------------------------------------------------------- binary

class BinaryBody:
    """Walks the binary records of a PLY body, element by element, one chunk of the file at a time.

    ``start`` holds the body's first bytes (already read with the header),
    ``unread`` how many bytes of the file follow them.
    """

    def __init__(self, fh: IO[bytes], start: bytes, unread: int, endian: str, chunk: int):
        self.fh, self.endian, self.chunk = fh, endian, max(int(chunk), 1)
        self.buf, self.off, self.unread = start, 0, unread

    @property
    def left(self) -> int:
        """Bytes from the current record to the end of the file."""
        return len(self.buf) - self.off + self.unread

    def fill(self, need: int) -> int:
        """Make ``need`` bytes (at most what is left) available from ``off``; returns how many are."""
        have = len(self.buf) - self.off
        if have < need and self.unread:
            want = min(self.unread, max(need - have, self.chunk))
            more = self.fh.read(want)
            self.unread = self.unread - len(more) if len(more) == want else 0  # a file that shrank ends here
            self.buf, self.off = self.buf[self.off:] + more, 0
            have = len(self.buf)
        return have

    def _dt(self, code: str) -> np.dtype[Any]:
        return np.dtype(self.endian + code)

    def check_end(self) -> None:
        """Refuse data after the last element: the header's counts would be smaller than the file's."""
        extra = self.left
        while self.left:
            got = self.fill(self.chunk)
            if self.buf[self.off:self.off + got].strip(b" \t\r\n\x00"):
                raise FormatError(f"{extra} bytes after the last element: the header's element counts "
                                  "are smaller than the file's data")
            self.off += got

    def element(self, e: Element, plan: Plan | None) -> Columns:
        """Read (or, without a plan, skip) one element; returns the plan's outputs."""
        plan = plan or Plan()
        if not any(len(p) == 3 for p in e.props):
            self._fixed(e, plan)
            return plan.result(e)
        smallest = sum(np.dtype(p[2] if len(p) == 3 else p[1]).itemsize for p in e.props)
        if e.count * smallest > self.left:
            raise FormatError(f"truncated data: element {e.name!r} announces {e.count} records, "
                              f"more than the {self.left} bytes left can hold")
        r = 0
        while r < e.count:
            first = self._lengths_at(e, r)
            if r == 0:  # room for one item more per record than the first has, as far as the file can hold
                isize = min(np.dtype(e.props[i][1]).itemsize for i in first)
                plan.allocate(e, min(e.count * (max(first.values()) + 1), self.left // isize))
            done = self._same_run(e, r, first, plan)
            if done < _RUN:
                done += self._walk(e, r + done, plan)
            r += done
        if e.count == 0:
            plan.allocate(e, 0)
        return plan.result(e)

    def _fixed(self, e: Element, plan: Plan) -> None:
        dt = np.dtype([(f"p{i}", self._dt(p[1])) for i, p in enumerate(e.props)])
        need = e.count * dt.itemsize
        if need > self.left:
            raise FormatError(f"truncated data: element {e.name!r} needs {need} bytes, {self.left} left")
        plan.allocate(e, 0)
        if not dt.itemsize:
            return
        per = max(1, self.chunk // dt.itemsize)
        for r in range(0, e.count, per):
            m = min(per, e.count - r)
            if self.fill(m * dt.itemsize) < m * dt.itemsize:
                raise FormatError(f"truncated data: element {e.name!r} needs {need} bytes, "
                                  f"{(r * dt.itemsize) + self.left} left")
            arr = np.frombuffer(self.buf, dtype=dt, count=m, offset=self.off)
            self.off += m * dt.itemsize
            for i in plan.scalars:
                plan.put(i, r, arr[f"p{i}"])

    def _count(self, code: str, at: int) -> int:
        dt = self._dt(code)
        value = int(np.frombuffer(self.buf, dtype=dt, count=1, offset=at)[0])
        if value < 0:
            raise FormatError(f"negative list length {value}")
        return value

    def _lengths_at(self, e: Element, r: int) -> dict[int, int]:
        """The list lengths of record ``r`` (at ``off``), its bytes made available in the buffer."""
        lengths = {}
        at = 0
        for i, p in enumerate(e.props):
            if len(p) == 2:
                at += np.dtype(p[1]).itemsize
                continue
            csize = np.dtype(p[2]).itemsize
            if self.fill(at + csize) < at + csize:
                raise FormatError("truncated data inside a list property") if r == 0 else _truncated(e, r)
            k = self._count(p[2], self.off + at)
            lengths[i] = k
            at += csize + k * np.dtype(p[1]).itemsize
            if at > self.left:
                raise FormatError(f"truncated data: a list of {k} items in element {e.name!r}") if r == 0 \
                    else _truncated(e, r)
        if self.fill(at) < at:
            raise _truncated(e, r)
        return lengths

    def _same_run(self, e: Element, r: int, first: dict[int, int], plan: Plan) -> int:
        """Records from ``r`` whose lists have the lengths of record ``r``, read at once; returns how many."""
        fields: list[tuple[Any, ...]] = []
        for i, p in enumerate(e.props):
            if len(p) == 2:
                fields.append((f"p{i}", self._dt(p[1])))
            else:
                fields.append((f"c{i}", self._dt(p[2])))
                if first[i]:
                    fields.append((f"p{i}", self._dt(p[1]), (first[i],)))
        dt = np.dtype(fields)
        m = min(e.count - r, (len(self.buf) - self.off) // dt.itemsize)
        window = _WINDOW
        while True:
            window = min(window, m)
            arr = np.frombuffer(self.buf, dtype=dt, count=window, offset=self.off)
            same = np.ones(window, dtype=bool)
            for i, k in first.items():
                same &= arr[f"c{i}"] == k
            if not same.all() or window == m:
                done = window if same.all() else int(np.argmin(same))
                break
            window *= 4
        arr = arr[:done]
        for i, p in enumerate(e.props):
            if len(p) == 2:
                plan.put(i, r, arr[f"p{i}"])
            elif first[i]:
                plan.put_lists(i, r, arr[f"p{i}"], first[i])
            else:
                plan.put_lists(i, r, np.zeros((done, 0), np.int64), 0)
        self.off += done * dt.itemsize
        return done

    def _walk(self, e: Element, r: int, plan: Plan) -> int:
        """Records from ``r`` one by one, as far as the buffer holds whole ones; returns how many."""
        lists = [j for j, p in enumerate(e.props) if len(p) == 3]
        if len(lists) == 1:
            return self._walk_one_list(e, r, plan, lists[0])
        layout = [(np.dtype(p[1]).itemsize, np.dtype(p[2]).itemsize if len(p) == 3 else 0,
                   self._dt(p[2]) if len(p) == 3 else None) for p in e.props]
        buf, end, at = self.buf, len(self.buf), self.off
        starts: list[list[int]] = [[] for _ in layout]
        lengths: list[list[int]] = [[] for _ in layout]
        done = 0
        while done < min(e.count - r, _WALK):
            rec = at
            for j, (isize, csize, cdt) in enumerate(layout):
                if cdt is None:
                    starts[j].append(at)
                    at += isize
                    continue
                if at + csize > end:
                    at = end + 1
                    break
                k = int.from_bytes(buf[at:at + csize], "little" if self.endian == "<" else "big",
                                   signed=cdt.kind == "i")
                if k < 0:
                    raise FormatError(f"negative list length {k}")
                starts[j].append(at + csize)
                lengths[j].append(k)
                at += csize + k * isize
            if at > end:
                for j in range(len(layout)):  # the record that does not fit: forget its parts
                    del starts[j][done:], lengths[j][done:]
                at = rec
                break
            done += 1
        self.off = at
        self._gather(e, r, plan, starts, lengths)
        return done

    def _walk_one_list(self, e: Element, r: int, plan: Plan, j0: int) -> int:
        """:meth:`_walk` for records with one list (the usual faces): the loop reads only the list
        lengths; where every property starts follows from a cumulative sum."""
        sizes = [np.dtype(p[1]).itemsize for p in e.props]  # a list's entry: the size of one item
        isize, ccode = sizes[j0], e.props[j0][2]
        csize = np.dtype(ccode).itemsize
        pre = sum(sizes[:j0])
        fixed = sum(sizes) - isize + csize  # a record's bytes besides its items
        buf, end, at = self.buf, len(self.buf), self.off
        ks: list[int] = []
        limit = min(e.count - r, _WALK)
        if ccode == "u1":
            while len(ks) < limit and at + pre < end:
                k = buf[at + pre]
                if at + fixed + k * isize > end:
                    break
                ks.append(k)
                at += fixed + k * isize
        else:
            unpack = struct.Struct(self.endian + np.dtype(ccode).char).unpack_from
            while len(ks) < limit and at + pre + csize <= end:
                k = unpack(buf, at + pre)[0]
                if k < 0:
                    raise FormatError(f"negative list length {k}")
                if at + fixed + k * isize > end:
                    break
                ks.append(k)
                at += fixed + k * isize
        ln = np.asarray(ks, dtype=np.int64)
        record = fixed + ln * isize
        rec = self.off + np.cumsum(record) - record
        starts = [rec + sum(sizes[:j]) if j < j0 else rec + pre + csize if j == j0 else
                  rec + csize + ln * isize + sum(sizes[:j]) - isize for j in range(len(sizes))]
        self.off = at
        self._gather(e, r, plan, starts, [ln] * len(sizes))
        return len(ks)

    def _gather(self, e: Element, r: int, plan: Plan, starts: Sequence[Sequence[int] | NDArray[Any]],
                lengths: Sequence[Sequence[int] | NDArray[Any]]) -> None:
        raw = np.frombuffer(self.buf, dtype=np.uint8)
        for j, p in enumerate(e.props):
            if j not in plan.scalars and j not in plan.sinks:
                continue
            dt = self._dt(p[1])
            pos = np.asarray(starts[j], dtype=np.int64)
            if len(p) == 2:
                plan.put(j, r, _bytes_at(raw, pos, dt))
            else:
                ln = np.asarray(lengths[j], dtype=np.int64)
                first = np.repeat(pos - (np.cumsum(ln) - ln) * dt.itemsize, ln)
                plan.put_lists(j, r, _bytes_at(raw, first + np.arange(int(ln.sum())) * dt.itemsize, dt), ln)


def _bytes_at(raw: NDArray[Any], pos: NDArray[Any], dt: np.dtype[Any]) -> NDArray[Any]:
    """The values of type ``dt`` starting at the byte positions ``pos`` of ``raw``."""
    idx = pos[:, None] + np.arange(dt.itemsize)
    return np.ascontiguousarray(raw[idx]).view(dt).reshape(-1)


# ---------------------------------------------------------------- ASCII

def _convert(toks: Any, code: str, what: str) -> NDArray[Any]:
    """Tokens (bytes) as numbers of the dtype ``code``: floats through float64, integers range-checked."""
    dt = np.dtype(code)
    try:
        a = np.array(toks, dtype="S")
        if dt.kind == "f":
            return a.astype(np.float64).astype(dt)
        v = a.astype(np.int64)
    except (ValueError, OverflowError):
        flat = list(np.asarray(toks, dtype="S").reshape(-1))
        bad = next((t for t in flat if not is_number(t, dt.kind)), flat[0] if flat else b"")
        raise FormatError(f"bad number {bad.decode(errors='replace')!r} in {what}") from None
    info = np.iinfo(dt)
    if v.size and (v.min() < info.min or v.max() > info.max):
        raise FormatError(f"value out of range for {dt} in {what}")
    return v.astype(dt)


class AsciiBody:
    """Walks the whitespace-separated values of an ASCII PLY body, one chunk of the file at a time.

    ``start`` holds the body's first bytes (already read with the header),
    ``unread`` how many bytes of the file follow them. Values are split only
    at whitespace, so a chunk boundary never cuts one.
    """

    def __init__(self, fh: IO[bytes], start: bytes, unread: int, chunk: int):
        self.fh, self.chunk = fh, max(int(chunk), 1)
        self.toks: list[bytes] = []
        self.pos = 0
        self.tail, self.unread = start, unread
        self.more()

    @property
    def available(self) -> int:
        return len(self.toks) - self.pos

    def bound(self) -> int:
        """At most this many values are left (a value and its separator take two bytes)."""
        return self.available + (len(self.tail) + self.unread + 1) // 2

    def more(self) -> bool:
        """Split the next chunk of the file into values; False when the file is done."""
        if not self.unread and not self.tail:
            return False
        while True:
            want = min(self.unread, self.chunk)
            more = self.fh.read(want)
            self.unread = self.unread - len(more) if len(more) == want else 0
            data = self.tail + more
            cut = len(data) if not self.unread else max(data.rfind(c) for c in _WHITESPACE) + 1
            if cut > 0:
                break
            self.tail = data  # one value longer than a chunk: read on
        self.toks = self.toks[self.pos:] + data[:cut].split()
        self.pos, self.tail = 0, data[cut:]
        return True

    def count_left(self) -> int:
        """How many values are left (reads to the end of the file; for error messages)."""
        count = self.available
        self.pos = len(self.toks)
        while self.more():
            count += len(self.toks)
            self.pos = len(self.toks)
        return count

    def check_end(self) -> None:
        """Refuse values after the last element: the header's counts would be smaller than the file's."""
        while not self.available and self.more():
            pass
        if self.available:
            raise FormatError(f"{self.count_left()} values after the last element: the header's "
                              "element counts are smaller than the file's data")

    def element(self, e: Element, plan: Plan | None) -> Columns:
        """Read (or, without a plan, skip) one element; returns the plan's outputs."""
        plan = plan or Plan()
        if not any(len(p) == 3 for p in e.props):
            self._fixed(e, plan)
            return plan.result(e)
        n = e.count
        if n * len(e.props) > self.bound():
            raise FormatError(f"truncated data: element {e.name!r} announces {n} records, "
                              f"more than the {self.count_left()} values left can hold")
        while not self.available and self.more():
            pass
        cols = self._first_widths(e) or []
        longest = max([k for _, k in cols if k is not None] + [0])
        plan.allocate(e, min(n * (longest + 1), self.bound()))  # as for binary files
        r = 0
        while r < n:
            if not self.available and self.more():
                continue
            done = self._same_run(e, r, plan)
            if done < _RUN:
                done += self._walk(e, r + done, plan)
            if not done and not self.more():
                raise _truncated(e, r)
            r += done
        return plan.result(e)

    def _fixed(self, e: Element, plan: Plan) -> None:
        n, width = e.count, len(e.props)
        if n * width > self.bound():
            raise FormatError(f"truncated data: element {e.name!r} needs {n * width} values, "
                              f"{self.count_left()} left")
        plan.allocate(e, 0)
        r = 0
        while r < n and width:
            m = min(n - r, self.available // width)
            if m == 0:
                if not self.more():
                    raise FormatError(f"truncated data: element {e.name!r} needs {n * width} values, "
                                      f"{r * width + self.available} left")
                continue
            block = self.toks[self.pos:self.pos + m * width]
            self.pos += m * width
            for i in plan.scalars:
                plan.put(i, r, _convert(block[i::width], e.props[i][1], f"element {e.name!r} property "
                                                                        f"{e.props[i][0]!r}"))
            r += m

    def _first_widths(self, e: Element) -> list[tuple[int, int | None]] | None:
        """(first value, list length or None) of each property in the next record; None when unclear."""
        toks, at = self.toks, self.pos
        cols: list[tuple[int, int | None]] = []
        try:
            for p in e.props:
                if len(p) == 3:
                    k = int(toks[at])
                    if k < 0 or k > len(toks) - at:
                        return None
                    cols.append((at - self.pos, k))
                    at += 1 + k
                else:
                    cols.append((at - self.pos, None))
                    at += 1
        except (IndexError, ValueError):
            return None
        return cols if at <= len(toks) else None

    def _same_run(self, e: Element, r: int, plan: Plan) -> int:
        """Records from ``r`` whose lists have the lengths of record ``r``, read at once; returns how many."""
        cols = self._first_widths(e)
        if cols is None:
            return 0
        width = sum(1 + (k or 0) if k is not None else 1 for _, k in cols)
        m = min(e.count - r, self.available // width)
        window = _WINDOW
        while True:
            window = min(window, m)
            block = np.array(self.toks[self.pos:self.pos + window * width], dtype="S").reshape(window, width)
            same = np.ones(window, dtype=bool)
            try:
                for start, k in cols:
                    if k is not None:
                        same &= block[:, start].astype(np.int64) == k
            except (ValueError, OverflowError):  # the record-by-record walk names the problem
                return 0
            if not same.all() or window == m:
                done = window if same.all() else int(np.argmin(same))
                break
            window *= 4
        for i, ((start, k), p) in enumerate(zip(cols, e.props)):
            what = f"element {e.name!r} property {p[0]!r}"
            if k is None and i in plan.scalars:
                plan.put(i, r, _convert(block[:done, start], p[1], what))
            elif k is not None and i in plan.sinks:
                items = _convert(block[:done, start + 1:start + 1 + k].reshape(-1), p[1], what)
                plan.put_lists(i, r, items.reshape(done, k), k)
        self.pos += done * width
        return done

    def _walk(self, e: Element, r: int, plan: Plan) -> int:
        """Records from ``r`` one by one, as far as the values read so far hold whole ones; returns how many."""
        toks, end, at = self.toks, len(self.toks), self.pos
        final = not self.unread and not self.tail
        vals: list[list[bytes]] = [[] for _ in e.props]
        lengths: list[list[int]] = [[] for _ in e.props]
        done = 0
        while done < min(e.count - r, _WALK):
            rec, whole = at, True
            for j, p in enumerate(e.props):
                if at >= end:
                    whole = False
                    break
                if len(p) == 2:
                    vals[j].append(toks[at])
                    at += 1
                    continue
                try:
                    k = int(toks[at])
                except ValueError:
                    raise FormatError(f"bad list length {toks[at].decode(errors='replace')!r} "
                                      f"in element {e.name!r} (record {r + done})") from None
                if k < 0:
                    raise FormatError(f"negative list length {k} in element {e.name!r}")
                if k > self.bound() - (at - self.pos):
                    raise _truncated(e, r + done)
                if at + 1 + k > end:
                    whole = False
                    break
                vals[j].extend(toks[at + 1:at + 1 + k])
                lengths[j].append(k)
                at += 1 + k
            if not whole:
                if final:
                    raise _truncated(e, r + done)
                for j in range(len(e.props)):  # the record that does not fit: forget its parts
                    del lengths[j][done:]
                    del vals[j][sum(lengths[j]) if len(e.props[j]) == 3 else done:]
                at = rec
                break
            done += 1
        self.pos = at
        for j, p in enumerate(e.props):
            what = f"element {e.name!r} property {p[0]!r}"
            if len(p) == 2 and j in plan.scalars:
                plan.put(j, r, _convert(vals[j], p[1], what))
            elif len(p) == 3 and j in plan.sinks:
                plan.put_lists(j, r, _convert(vals[j], p[1], what), np.asarray(lengths[j], np.int64))
        return done


# ---------------------------------------------------------------- writing

Polygons = tuple[NDArray[Any], NDArray[Any]]  # corners (c,), sizes (f,)


def binary_records(columns: list[tuple[str, NDArray[Any]]], polygons: Polygons,
                   types: tuple[np.dtype[Any], np.dtype[Any]], chunk: int) -> Iterator[bytes]:
    """Binary little-endian records of the vertices (``columns``: name, (n,) values) and the
    polygons (list count and index dtypes ``types``), about ``chunk`` bytes at a time."""
    dt = np.dtype([(cname, col.dtype.newbyteorder("<")) for cname, col in columns])
    n = len(columns[0][1])
    per = max(1, chunk // dt.itemsize)
    for a in range(0, n, per):
        block = np.empty(min(per, n - a), dtype=dt)
        for cname, col in columns:
            block[cname] = col[a:a + per]
        yield block.tobytes()
    c, s = polygons
    if not s.size:
        return
    cdt, idt = types
    k = int(s[0])
    if (s == k).all():  # one polygon size: fixed records
        rec = np.dtype([("k", cdt), ("i", idt, (k,))])
        per = max(1, chunk // rec.itemsize)
        for a in range(0, len(s), per):
            block = np.empty(min(per, len(s) - a), dtype=rec)
            block["k"] = k
            block["i"] = c[a * k:(a + len(block)) * k].reshape(-1, k)
            yield block.tobytes()
        return
    csize, isize = cdt.itemsize, idt.itemsize
    per = max(1, chunk // (8 * (csize + 4 * isize)))  # the byte positions below take 8 bytes per byte written
    first = 0
    for a in range(0, len(s), per):
        sz = s[a:a + per]
        cc = c[first:first + int(sz.sum())]
        first += len(cc)
        record = csize + sz * isize
        rec_start = np.cumsum(record) - record
        buf = np.empty(int(record.sum()), dtype=np.uint8)
        buf[rec_start[:, None] + np.arange(csize)] = sz.astype(cdt).view(np.uint8).reshape(-1, csize)
        starts = np.cumsum(sz) - sz
        dest = np.repeat(rec_start + csize - starts * isize, sz) + np.arange(len(cc)) * isize
        buf[dest[:, None] + np.arange(isize)] = cc.astype(idt).view(np.uint8).reshape(-1, isize)
        yield buf.tobytes()


def ascii_records(columns: list[tuple[str, NDArray[Any]]], polygons: Polygons, chunk: int) -> Iterator[bytes]:
    """ASCII records, one line each: floats with 9 (float32) or 17 (float64) significant digits,
    integers in full; about ``chunk`` bytes at a time."""
    row = " ".join(("%.9g" if col.dtype.itemsize == 4 else "%.17g") if col.dtype.kind == "f" else "%d"
                   for _, col in columns)
    n = len(columns[0][1])
    per = max(1, chunk // (24 * len(columns)))  # a value takes up to about 24 characters
    for a in range(0, n, per):
        lists = [col[a:a + per].astype(np.float64 if col.dtype.kind == "f" else np.int64).tolist()
                 for _, col in columns]
        yield "".join([row % r + "\n" for r in zip(*lists)]).encode("ascii")
    c, s = polygons
    if not s.size:
        return
    k = int(s[0])
    per = max(1, chunk // (12 * (k + 1)))
    if (s == k).all():
        face = " ".join(["%d"] * (k + 1)) + "\n"
        for a in range(0, len(s), per):
            rows = c[a * k:(a + per) * k].reshape(-1, k)
            block = np.column_stack([np.full(len(rows), k), rows]).tolist()
            yield "".join([face % tuple(r) for r in block]).encode("ascii")
        return
    first = 0
    for a in range(0, len(s), per):
        sz = s[a:a + per]
        cl, ends = c[first:first + int(sz.sum())].tolist(), np.cumsum(sz).tolist()
        first += len(cl)
        yield "".join([f"{b - a0} " + " ".join(map(str, cl[a0:b])) + "\n"
                       for a0, b in zip([0] + ends[:-1], ends)]).encode("ascii")
