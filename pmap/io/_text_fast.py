"""Compiled kernels for streaming plain numeric text tables (used by :mod:`pmap.io._text`).

A "plain" table has one record per line, fields separated by one delimiter byte
(or runs of spaces/tabs), and numbers written as ``[+-]digits[.digits][e[+-]digits]``.
:func:`parse_block` turns such lines into float64 values, each correctly rounded
(as pandas' C parser and Python's ``float`` give them) by Clinger's exact case: a
mantissa of at most 53 bits times or divided by a power of ten up to 1e22, both
exact doubles, so that one IEEE multiplication or division rounds once (W. D.
Clinger, "How to read floating point numbers accurately", PLDI 1990). Any line
outside that (quotes, comments, missing or non-numeric values, field count
changes, more than 15-16 significant digits, large exponents...) makes the
kernel give up, and the caller reads the whole file with pandas instead: every
message and corner case then stays pandas'.

Distinct values are numbered in order of first appearance in open-addressing hash
tables keyed by the float64 bit pattern (``-0.0`` folded onto ``0.0``); the grid
index of each number is found once, and :func:`scatter` puts every row's value
into a pool of whole Zarr chunks (``pool[slot, y, x, channel]``) with a
duplicate check on every cell.
"""

from __future__ import annotations

import numba as nb
import numpy as np

#: Marks an empty hash-table slot: a NaN payload that parsing never produces.
EMPTY = np.int64(0x7FF8DEADBEEF0001)
_NEG_ZERO = np.int64(-(2**63))
#: Powers of ten 1e0 .. 1e22: the ones that are exact doubles.
POW10 = np.array([float(f"1e{k}") for k in range(23)])

# parse_block status codes
DONE, FULL, BAIL = 0, 1, 2
# scatter status codes (DONE as above)
NEED_CHUNK, DUPLICATE, UNKNOWN = 1, 2, 3

#: Integers below 2**53 are exact doubles.
_EXACT = 2**53
_NL, _CR, _SP, _TAB = 10, 13, 32, 9
_QUOTE, _HASH = 34, 35
_PLUS, _MINUS, _DOT, _E, _e = 43, 45, 46, 69, 101


@nb.njit(cache=True, nogil=True)
def parse_block(buf, pos, end, final, delim, ncols, slot, out, nrow, pow10):
    """Parse whole lines of ``buf[pos:end]`` into ``out[slot[j], row]`` (float64).

    ``delim`` is the delimiter byte, 0 for runs of spaces/tabs (leading and trailing
    ones allowed); ``slot[j]`` is the row of ``out`` for field j, or -1 to skip it
    (any text but quotes, ``#`` and NUL). Blank lines are skipped; ``\r\n`` ends a line
    like ``\n``. An unterminated last line counts only when ``final``. Returns
    (status, pos, nrow): DONE (all whole lines read; pos is where the unfinished rest
    starts), FULL (``out`` has no room left; pos is the next line) or BAIL (a line
    outside the plain grammar).

    One loop over the bytes; a number's digits accumulate as an integer
    ``mantissa * 10 + digit`` (a double holds it exactly below 2**53), then one
    multiplication or division by
    ``pow10[|exponent|]`` (exact up to 1e22) rounds it correctly.
    """
    cap = out.shape[1]
    ws = delim == 0
    line = pos
    if nrow >= cap and pos < end:
        return FULL, pos, nrow
    # per line: fields done; per field: start, state and digits
    j = 0
    fstart = pos
    blanks = False  # whitespace mode: the line has leading blanks
    mant, nd, ndec = 0, 0, 0
    phase, neg, eneg, en, ed, bad = 0, False, False, 0, 0, False
    pstart, plen, pv0, pv1 = 0, 0, 0.0, 0.0  # the last line's first two fields
    while True:
        if pos < end:
            c = np.int64(buf[pos])
        elif final and (pos > line):
            c = _NL  # the unterminated last line of the file
        else:
            return DONE, line, nrow
        d = c - 48
        if 0 <= d <= 9:
            mant = mant * 10 + d
            nd += 1
            ndec += phase
            pos += 1
            continue
        sep = (c == _SP or c == _TAB) if ws else c == delim
        if c == _CR:
            if pos + 1 < end:
                if buf[pos + 1] != _NL:
                    return BAIL, line, nrow
                if fstart == pos:
                    fstart += 1
                pos += 1
                c = _NL
            elif not final:
                return DONE, line, nrow
            else:
                c = _NL
        if sep or c == _NL:
            if ws and pos == fstart:
                if c == _NL:
                    if j == 0:
                        if blanks:
                            return BAIL, line, nrow  # a line of blanks: leave it to pandas
                        pos += 1  # blank line
                        line = pos
                        fstart = pos
                        if nrow >= cap and pos < end:
                            return FULL, pos, nrow
                        continue
                else:
                    if j == 0:
                        blanks = True
                    pos += 1
                    fstart = pos
                    continue
            elif c == _NL and j == 0 and pos == fstart:
                pos += 1  # blank line
                line = pos
                fstart = pos
                if nrow >= cap and pos < end:
                    return FULL, pos, nrow
                continue
            # end of field j
            if not (ws and pos == fstart):
                if j >= ncols:
                    return BAIL, line, nrow  # too many fields
                k = slot[j]
                if k >= 0:
                    if bad or nd == 0 or (phase == 2 and ed == 0):
                        return BAIL, line, nrow
                    if nd > 18:  # the integer mantissa may have wrapped
                        return BAIL, line, nrow
                    number = np.float64(mant)
                    if mant != 0:
                        # exact integer mantissa and power of ten: one correctly rounded step
                        exponent = (-en if eneg else en) - ndec
                        if mant >= _EXACT or exponent > 22 or exponent < -22:
                            return BAIL, line, nrow
                        if exponent > 0:
                            number *= pow10[exponent]
                        elif exponent < 0:
                            number /= pow10[-exponent]
                    val = -number if neg else number
                    out[k, nrow] = val
                    if j == 0:
                        pv0 = val
                    elif j == 1:
                        pv1 = val
                j += 1
                mant, nd, ndec = 0, 0, 0
                phase, neg, eneg, en, ed, bad = 0, False, False, 0, 0, False
                if j == 2 and c != _NL:  # this line's first two fields, for the next line
                    pstart, plen = line, pos + 1 - line
            pos += 1
            fstart = pos
            if c == _NL:
                if j != ncols:
                    return BAIL, line, nrow  # too few fields
                nrow += 1
                j = 0
                blanks = False
                line = pos
                if nrow >= cap and pos < end:
                    return FULL, pos, nrow
                if pos >= end and final:
                    return DONE, pos, nrow
                # a line that starts with the same bytes as the last one (a long table's
                # x and y for every channel of a pixel) has the same first two values
                if plen > 0 and pos + plen <= end:
                    t = 0
                    while t < plen and buf[pos + t] == buf[pstart + t]:
                        t += 1
                    if t == plen:
                        if slot[0] >= 0:
                            out[slot[0], nrow] = pv0
                        if slot[1] >= 0:
                            out[slot[1], nrow] = pv1
                        j = 2
                        pos += plen
                        fstart = pos
            continue
        if c == _DOT:
            if phase == 0:
                phase = 1
            else:
                bad = True
        elif c == _E or c == _e:
            if phase < 2 and nd > 0:
                # the exponent: optional sign, then up to 17 digits, read here
                phase = 2
                pos += 1
                if pos < end and (buf[pos] == _MINUS or buf[pos] == _PLUS):
                    eneg = buf[pos] == _MINUS
                    pos += 1
                while pos < end and 48 <= buf[pos] <= 57:
                    if ed < 17:
                        en = en * 10 + (np.int64(buf[pos]) - 48)
                    else:
                        bad = True  # pandas would stop reading there
                    ed += 1
                    pos += 1
                continue
            bad = True
        elif c == _MINUS or c == _PLUS:
            if pos == fstart:
                neg = c == _MINUS
            else:
                bad = True
        elif c == _QUOTE or c == _HASH or c == 0:
            return BAIL, line, nrow
        else:
            bad = True
        pos += 1


@nb.njit(cache=True, nogil=True)
def _home(bits, mask):
    # splitmix64 finaliser: every input bit reaches the low bits (float keys end in zeros)
    z = np.uint64(bits)
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    z = z ^ (z >> np.uint64(31))
    return np.int64(z & np.uint64(mask))


@nb.njit(cache=True, nogil=True, inline="always")
def _probe(table, b, mask):
    """Slot of value bits ``b`` in the open-addressing table: where it is, or the first
    empty slot on its probe path (linear probing from :func:`_home`)."""
    h = _home(b, mask)
    while table[h] != b and table[h] != EMPTY:
        h = (h + 1) & mask
    return h


@nb.njit(cache=True, nogil=True)
def intern(bits, n, table, ids, order, count, out, start):
    """Number the distinct values of bits[start:n] (float64 bit patterns) in order of
    first appearance: ``out[i]`` is the number of value i.

    ``table``/``ids`` are the hash table (keys, their numbers), ``order[k]`` the key
    numbered k, ``count[0]`` how many there are. Returns the index where it stopped:
    n when done, less when the table is half full or ``order`` full (grow, go on).
    """
    mask = table.size - 1
    limit = min(table.size // 2, order.size)
    last, last_id = EMPTY, -1
    for i in range(start, n):
        b = bits[i]
        if b == _NEG_ZERO:
            b = 0
        if b != last:
            if last_id + 1 < count[0] and order[last_id + 1] == b:
                last_id += 1  # the value numbered after the last one (channels in order)
            else:
                h = _probe(table, b, mask)
                if table[h] == b:
                    last_id = ids[h]
                else:  # a new value: numbered next
                    if count[0] >= limit:
                        return i
                    k = count[0]
                    table[h], ids[h], order[k] = b, k, b
                    count[0] = k + 1
                    last_id = k
            last = b
        out[i] = last_id
    return n


@nb.njit(cache=True, nogil=True)
def lookup(bits, n, table, ids, out):
    """``out[i]``: the number of value bits[i] in the hash table, -1 if it is not there."""
    mask = table.size - 1
    last, last_id = EMPTY, -1
    for i in range(n):
        b = bits[i]
        if b == _NEG_ZERO:
            b = 0
        if b != last:
            h = _probe(table, b, mask)
            last_id = ids[h] if table[h] == b else -1
            last = b
        out[i] = last_id


@nb.njit(cache=True, nogil=True, inline="always")
def _slot(iy, ix, cy, cx, nbx, slot_of, stamp, clock, res):
    """Pool slot of the chunk holding pixel (iy, ix) and the pixel's place in it:
    (slot, ly, lx); slot −1 with res[0] = the chunk's key when it is not in the pool.
    A found slot is stamped as used now (least recently used eviction)."""
    by = iy // cy
    bx = ix // cx
    key = by * nbx + bx
    s = slot_of[key]
    if s < 0:
        res[0] = key
        return -1, 0, 0
    stamp[s] = clock[0]
    clock[0] += 1
    return s, iy - by * cy, ix - bx * cx


@nb.njit(cache=True, nogil=True)
def scatter(
    xid, yid, sid, vals, n, start, xmap, ymap, smap,
    cy, cx, nbx, slot_of, pool, stamp, clock, res,
):  # fmt: skip
    """Put rows start..n-1 into the chunk pool; a long table when ``sid`` has n values.

    Row i sits at grid (``ymap[yid[i]]``, ``xmap[xid[i]]``). Long table: its value
    ``vals[0, i]`` goes to channel ``smap[sid[i]]``; wide table: the whole spectrum
    ``vals[:, i]``. Returns (status, row) with status DONE, NEED_CHUNK (``res[0]`` =
    chunk key not in the pool), DUPLICATE (``res[:3]`` = y, x, channel index of a
    cell given twice; channel -1 for a whole spectrum) or UNKNOWN (a value the
    first pass did not see: the file changed).
    """
    long = sid.size == n and n > 0
    ns = pool.shape[3]
    for i in range(start, n):
        if xid[i] < 0 or yid[i] < 0:
            return UNKNOWN, i
        ix = xmap[xid[i]]
        iy = ymap[yid[i]]
        s, ly, lx = _slot(iy, ix, cy, cx, nbx, slot_of, stamp, clock, res)
        if s < 0:
            return NEED_CHUNK, i
        if long:
            if sid[i] < 0:
                return UNKNOWN, i
            ic = smap[sid[i]]
            if not np.isnan(pool[s, ly, lx, ic]):
                res[0], res[1], res[2] = iy, ix, ic
                return DUPLICATE, i
            pool[s, ly, lx, ic] = vals[0, i]
        else:
            for c in range(ns):
                if not np.isnan(pool[s, ly, lx, c]):
                    res[0], res[1], res[2] = iy, ix, -1
                    return DUPLICATE, i
            for c in range(ns):
                pool[s, ly, lx, c] = vals[c, i]
    return DONE, n


@nb.njit(cache=True, nogil=True)
def encode_runs(xid, yid, sid, n, rx, ry, rs, rl):
    """Cut rows 0..n-1 into runs of the same x and y numbers whose spectral numbers go
    up by one (a pixel's channels in a long table); run r is (``rx[r]``, ``ry[r]``,
    first spectral number ``rs[r]``, ``rl[r]`` rows). Returns the number of runs."""
    r = -1
    for i in range(n):
        if r >= 0 and xid[i] == rx[r] and yid[i] == ry[r] and sid[i] == rs[r] + rl[r]:
            rl[r] += 1
        else:
            r += 1
            rx[r], ry[r], rs[r], rl[r] = xid[i], yid[i], sid[i], 1
    return r + 1


@nb.njit(cache=True, nogil=True)
def scatter_runs(
    rx, ry, rs, rl, nr, start, vals, vpos, xmap, ymap, smap,
    cy, cx, nbx, slot_of, pool, stamp, clock, res,
):  # fmt: skip
    """Put runs start..nr-1 (see :func:`encode_runs`) of a long table into the pool;
    their values are ``vals[vpos[0]:]`` in order. Returns (status, run) as
    :func:`scatter` does (DONE, NEED_CHUNK or DUPLICATE)."""
    v = vpos[0]
    for r in range(start, nr):
        ix = xmap[rx[r]]
        iy = ymap[ry[r]]
        s, ly, lx = _slot(iy, ix, cy, cx, nbx, slot_of, stamp, clock, res)
        if s < 0:
            return NEED_CHUNK, r
        s0 = rs[r]
        for t in range(rl[r]):
            ic = smap[s0 + t]
            if not np.isnan(pool[s, ly, lx, ic]):
                res[0], res[1], res[2] = iy, ix, ic
                return DUPLICATE, r
            pool[s, ly, lx, ic] = vals[v + t]
        v += rl[r]
        vpos[0] = v
    return DONE, nr
