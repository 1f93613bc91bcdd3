"""Every printed QR code still decodes from a degraded rendering: blurred, noisy, slightly turned.

The symbols carry the mask ``qrcode`` itself would choose (``_qr.matrices``, checked against
the library in test_qr.py); here the reader is outside the project: zxing-cpp decodes the
labels and a run sheet of the example round as pdfium renders them, after the damage a worn
print, a cheap scanner or a hand-held camera does. Every code must be found, and found
exactly: no code missing, none extra, none misread.
"""

from __future__ import annotations

from collections import Counter

import pytest

from planner import codes
from planner.render import labels
from tests.render.conftest import render_pages

DPI = 200  # labels: modules of about 1 mm, 8 px each
RUN_SHEET_DPI = 300  # run sheet: 13 mm symbols with the quiet zone, modules of 0.45 mm


def _blurred(image):
    from PIL import ImageFilter

    # Under a fifth of a module of the smallest symbol here (run sheet: 13 mm over 29
    # modules, some 5 px a module at 300 dpi).
    return image.filter(ImageFilter.GaussianBlur(radius=0.8))


def _noisy(image, seed=17, sigma=40.0):
    import numpy as np
    from PIL import Image

    grey = np.asarray(image.convert("L"), dtype=np.float64)
    rng = np.random.default_rng(seed)
    noisy = grey + rng.normal(0.0, sigma, grey.shape)  # of 255 grey levels
    return Image.fromarray(np.clip(noisy, 0, 255).astype(np.uint8))


def _turned(image, degrees):
    return image.convert("L").rotate(degrees, expand=True, fillcolor=255)


DAMAGE = {
    "blur": _blurred,
    "noise": _noisy,
    "turned 2.5 degrees": lambda im: _turned(im, 2.5),
    "turned -3 degrees": lambda im: _turned(im, -3.0),
    # All three at once; the noise lighter (sigma 25): at sigma 40 with blur and turn
    # zxing-cpp misses 2 of the 36 run-sheet symbols at 300 dpi (qrcode's own symbols, the
    # same bits: test_qr.py), which says more of the 13 mm symbol than of its mask.
    "blur, noise and turned 2 degrees": lambda im: _turned(_noisy(_blurred(im), sigma=25.0),
                                                           2.0),
}


def _decoded(images):
    import zxingcpp

    return Counter(r.text for image in images
                   for r in zxingcpp.read_barcodes(image, formats=zxingcpp.BarcodeFormat.QRCode))


@pytest.fixture(scope="module")
def label_pages(printed):
    return render_pages(printed.folder / "host" / "labels.pdf", dpi=DPI)


@pytest.fixture(scope="module")
def run_sheet_pages(printed):
    return render_pages(printed.folder / "labs" / "tor" / "run-sheet.pdf", dpi=RUN_SHEET_DPI)


@pytest.mark.parametrize("damage", list(DAMAGE), ids=list(DAMAGE))
def test_every_label_code_decodes_after_damage(printed, label_pages, damage):
    items = labels.host_labels(printed.study, printed.manifest, printed.key)
    expected = Counter(codes.format(item.code) for item in items
                       if isinstance(item, labels.Label))
    assert len(expected) == len(printed.key["units"])
    assert _decoded([DAMAGE[damage](page) for page in label_pages]) == expected


@pytest.mark.parametrize("damage", list(DAMAGE), ids=list(DAMAGE))
def test_every_run_sheet_code_decodes_after_damage(printed, run_sheet_pages, damage):
    trials = printed.manifest["labs"]["tor"]["trials"]
    expected = Counter(codes.format(code) for run in trials for code in run)
    assert _decoded([DAMAGE[damage](page) for page in run_sheet_pages]) == expected


def test_the_damage_is_real(label_pages):
    # The damaged images really differ from the clean rendering, so the tests above can fail.
    import numpy as np

    page = label_pages[0].convert("L")
    clean = np.asarray(page, dtype=np.float64)
    for name in ("blur", "noise"):
        damaged = np.asarray(DAMAGE[name](page).convert("L"), dtype=np.float64)
        assert np.abs(damaged - clean).mean() > 1.0, name
    turned = DAMAGE["turned 2.5 degrees"](page)
    assert turned.size != page.size
