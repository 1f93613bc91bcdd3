"""QR codes: the matrix from ``qrcode``, drawn as a 1-bit image mask.

A code such as ``K7QM-4X9PA`` fits QR version 1 (21 x 21 modules) in
alphanumeric mode at error-correction level Q (up to 16 characters, ISO/IEC
18004 table 7), which survives about a quarter of the symbol being smudged.

Each symbol is drawn as one inline image mask, one bit per module, painted in
the current fill colour and scaled to size: about 130 bytes of content before
compression, where even merged rectangles cost several hundred, and there are
no seams between neighbouring modules for an anti-aliasing renderer to show.
``/Interpolate`` is left at its default (false), so printers and viewers scale
the modules as sharp squares. The quiet zone of 4 modules (ISO/IEC 18004) is
left blank around the image by the caller; ``QUIET`` gives its width.

While a ``session`` is open, every symbol is made once: ``prepare`` makes the symbols of
a round's codes in batches (in worker processes if asked) and keeps their operators, and
``image_masks`` and ``flowable`` take them from there, so that a unit's label and its row
on a run sheet share one symbol. Outside a session nothing is kept.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Sequence
from contextlib import contextmanager
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from reportlab.pdfgen.canvas import Canvas

__all__ = ["CHUNK", "QUIET", "draw", "flowable", "image_mask", "image_masks", "matrices",
           "matrix", "modules", "prepare", "session", "stream"]

QUIET = 4
"""Width of the blank quiet zone around a symbol, in modules."""


def matrix(text: str) -> list[list[bool]]:
    """Return the QR matrix of ``text`` (True = dark module), without quiet zone."""
    return matrices([text])[0]


def matrices(texts: Sequence[str]) -> list[list[list[bool]]]:
    """Return the QR matrix of every text, each with the mask ``qrcode`` itself would choose.

    ``qrcode`` tries the 8 masks of ISO/IEC 18004 and keeps the one with the lowest
    penalty, building and scoring each masked symbol in pure Python (about 1.7 ms a code).
    Here each symbol is built once; its 8 masked variants differ only in the data modules,
    so they are made by one XOR each and all variants of all texts are scored together
    with numpy (``_penalties``: the four rules and weights of ``qrcode.util.lost_point``);
    ``qrcode`` then writes the chosen mask's format bits. A test compares the result with
    ``qrcode``'s own choice over thousands of codes.
    """
    if len(texts) > _BATCH:  # numpy works best on arrays that stay in the cache
        return [grid for i in range(0, len(texts), _BATCH)
                for grid in matrices(texts[i:i + _BATCH])]
    import numpy as np
    import qrcode
    from qrcode.constants import ERROR_CORRECT_Q
    from qrcode.exceptions import DataOverflowError

    symbols = []
    for text in texts:
        # Version 1 holds a code (16 alphanumeric characters at level Q); a longer text
        # gets the smallest version that holds it, as qrcode's fitting would choose.
        symbol = qrcode.QRCode(version=1, error_correction=ERROR_CORRECT_Q, border=0,
                               mask_pattern=0)
        symbol.add_data(text)
        try:
            symbol.make(fit=False)  # data encoded, mask 0 applied
        except DataOverflowError:
            symbol = qrcode.QRCode(version=None, error_correction=ERROR_CORRECT_Q, border=0,
                                   mask_pattern=0)
            symbol.add_data(text)
            symbol.make(fit=True)
        symbols.append(symbol)
    out: list[list[list[bool]]] = [[] for _ in symbols]
    for version in sorted({s.version for s in symbols}):
        chosen = [i for i, s in enumerate(symbols) if s.version == version]
        data, function = _layout_of(symbols[chosen[0]])
        masks = _mask_grids(data.shape[0])
        flip = data[None, :, :] & (masks[0][None, :, :] ^ masks)  # mask 0 -> mask k
        base = np.array([symbols[i].modules for i in chosen], dtype=bool)
        # What qrcode scores: each symbol with its format modules and dark module light.
        test = np.where(data[None, :, :], base, function[None, :, :])
        variants = test[:, None, :, :] ^ flip[None, :, :, :]
        n = data.shape[0]
        scores = _penalties(variants.reshape(-1, n, n)).reshape(len(chosen), 8)
        best = np.argmin(scores, axis=1)  # the first of equals, as qrcode
        for row, i in enumerate(chosen):
            symbol = symbols[i]
            symbol.modules = (base[row] ^ flip[best[row]]).tolist()
            symbol.setup_type_info(False, int(best[row]))
            out[i] = [list(r) for r in symbol.modules]
    return out


_BATCH = 64
"""Symbols scored together (0.36 ms a code in batches of 64, 0.52 ms one by one)."""

_LAYOUTS: dict[int, Any] = {}


def _layout_of(symbol: Any) -> tuple[Any, Any]:
    """Return, for the symbol's version, the grid of the modules ``map_data`` fills (data and
    error correction) and the function patterns as qrcode scores them (format info light)."""
    import numpy as np
    from qrcode.main import copy_2d_array, precomputed_qr_blanks

    if symbol.version not in _LAYOUTS:
        kept = symbol.modules
        symbol.modules = copy_2d_array(precomputed_qr_blanks[symbol.version])
        symbol.setup_type_info(True, 0)
        if symbol.version >= 7:
            symbol.setup_type_number(True)
        cells = symbol.modules
        symbol.modules = kept
        _LAYOUTS[symbol.version] = (
            np.array([[cell is None for cell in row] for row in cells], dtype=bool),
            np.array([[bool(cell) for cell in row] for row in cells], dtype=bool))
    return _LAYOUTS[symbol.version]


_MASKS: dict[int, Any] = {}


def _mask_grids(n: int) -> Any:
    """Return the 8 mask patterns of ISO/IEC 18004 on an n x n grid (True = invert)."""
    import numpy as np
    from qrcode import util

    if n not in _MASKS:
        _MASKS[n] = np.array([[[util.mask_func(k)(i, j) for j in range(n)] for i in range(n)]
                              for k in range(8)], dtype=bool)
    return _MASKS[n]


def _runs_penalty(grids: Any) -> Any:
    """N1: every run of 5 or more same-colour modules along a row costs its length - 2."""
    import numpy as np

    k, rows, n = grids.shape
    flat = grids.reshape(k * rows, n)
    change = np.ones((k * rows, n + 1), dtype=bool)
    change[:, 1:n] = flat[:, 1:] != flat[:, :-1]
    row, col = np.nonzero(change)
    lengths = np.diff(col)
    inside = row[1:] == row[:-1]
    lengths, owner = lengths[inside], row[1:][inside]
    cost = np.where(lengths >= 5, lengths - 2, 0)
    per_row = np.bincount(owner, weights=cost, minlength=k * rows)
    return per_row.reshape(k, rows).sum(axis=1).astype(np.int64)


def _penalties(grids: Any) -> Any:
    """Return the penalty of each of a stack of symbols, as ``qrcode.util.lost_point``."""
    import numpy as np

    k, n, _ = grids.shape
    n1 = _runs_penalty(grids) + _runs_penalty(grids.transpose(0, 2, 1))
    same = ((grids[:, :-1, :-1] == grids[:, :-1, 1:]) & (grids[:, :-1, :-1] == grids[:, 1:, :-1])
            & (grids[:, :-1, :-1] == grids[:, 1:, 1:]))
    n2 = 3 * same.reshape(k, -1).sum(axis=1)
    # N3: a 1:1:3:1:1 finder-like run with 4 light modules on one side, read as 11-bit
    # numbers along rows and columns.
    weights = 1 << np.arange(10, -1, -1)
    n3 = np.zeros(k, dtype=np.int64)
    for g in (grids, grids.transpose(0, 2, 1)):
        value = np.lib.stride_tricks.sliding_window_view(g, 11, axis=2) @ weights
        n3 += 40 * ((value == _FINDER_LIKE) | (value == _FINDER_LIKE_REVERSED)).reshape(
            k, -1).sum(axis=1)
    # N4: 10 for every full 5 % the share of dark modules is off 50 % (qrcode's arithmetic).
    share = grids.reshape(k, -1).sum(axis=1) / float(n ** 2)
    n4 = (np.abs(share * 100 - 50) / 5).astype(np.int64) * 10
    return n1 + n2 + n3 + n4


_FINDER_LIKE = int("10111010000", 2)
_FINDER_LIKE_REVERSED = int("00001011101", 2)


def modules(ops: str) -> int:
    """Return the number of modules across a symbol drawn by ``image_mask`` operators."""
    return int(ops.split("/W ", 1)[1].split(" ", 1)[0])


def image_mask(grid: Sequence[Sequence[bool]]) -> str:
    """Return PDF inline-image operators that paint the dark modules of ``grid`` in a unit square."""
    n = len(grid)
    rows = []
    for row in grid:
        bits = 0
        for dark in row:
            bits = (bits << 1) | bool(dark)
        pad = (-n) % 8
        rows.append((bits << pad).to_bytes((n + pad) // 8, "big").hex())
    # /D [1 0]: a 1 bit (dark module) paints; ASCIIHex keeps the content stream text.
    return f"BI /W {n} /H {n} /IM true /BPC 1 /D [1 0] /F /AHx ID {''.join(rows)}> EI"


def _made(texts: Sequence[str]) -> list[str]:
    """Return ``image_mask(matrix(t))`` for every text, made now; a worker process's task."""
    return [image_mask(grid) for grid in matrices(texts)]


def image_masks(texts: Iterable[str]) -> list[str]:
    """Return ``image_mask(matrix(t))`` for every text; symbols of the open session are made
    once (the rest together, in batches) and kept."""
    wanted = list(texts)
    if _kept is None:
        return _made(wanted)
    missing = list(dict.fromkeys(t for t in wanted if t not in _kept))
    if missing:
        _kept.update(zip(missing, _made(missing)))
    return [_kept[t] for t in wanted]


CHUNK = 240
"""Symbols per task handed to a worker process."""

_kept: dict[str, str] | None = None


@contextmanager
def session() -> Iterator[None]:
    """Keep every symbol made inside the block for the rest of it (nested blocks share it)."""
    global _kept
    if _kept is not None:
        yield
        return
    _kept = {}
    try:
        yield
    finally:
        _kept = None


def stream(texts: Sequence[str], *, workers: int = 1, chunk: int = CHUNK) -> Iterator[str]:
    """Yield ``image_mask(matrix(t))`` for every text in order: from the open session if it
    has them all, else made in batches, in ``workers`` processes (``chunk`` symbols a task)
    when there are enough, while the caller draws the first; kept in the open session."""
    if _kept is not None and all(t in _kept for t in texts):
        yield from (_kept[t] for t in texts)
        return
    if workers <= 1 or len(texts) < 2 * chunk:
        yield from image_masks(texts)
        return
    from planner.render import _workers

    chunks = [texts[i:i + chunk] for i in range(0, len(texts), chunk)]
    with _workers.pool(workers) as pool:
        for part, made in zip(chunks, pool.map(_made, chunks)):
            if _kept is not None:
                _kept.update(zip(part, made))
            yield from made


def prepare(texts: Iterable[str], *, workers: int = 1) -> None:
    """Make the symbols of ``texts`` that the open session lacks, in ``workers`` processes
    when there are enough of them; without a session, do nothing."""
    if _kept is None:
        return
    for _ in stream([t for t in dict.fromkeys(texts) if t not in _kept], workers=workers):
        pass


def draw(canvas: Canvas, ops: str, x: float, y: float, side: float) -> None:
    """Paint the symbol ``ops`` in black with its lower-left corner at (x, y), ``side`` points across.

    The quiet zone is outside this square.
    """
    canvas.addLiteral(f"q 0 g {side:.3f} 0 0 {side:.3f} {x:.3f} {y:.3f} cm {ops} Q")


def flowable(text: str, side: float) -> Any:
    """Return a platypus flowable of the symbol of ``text``, ``side`` points across with its quiet zone."""
    from reportlab.platypus import Flowable

    ops = image_masks([text])[0]
    n = modules(ops)

    class _Symbol(Flowable):  # type: ignore[misc]
        def wrap(self, avail_width: float, avail_height: float) -> tuple[float, float]:
            return side, side

        def draw(self) -> None:
            inner = side * n / (n + 2 * QUIET)
            margin = (side - inner) / 2
            draw(self.canv, ops, margin, margin, inner)

    return _Symbol()
