"""The band chart, decoded by tools outside the project: Pillow for PNG, ElementTree for SVG.

PNG validity follows the PNG specification (W3C / ISO 15948): the 8-byte signature, IHDR first,
every chunk's CRC right (Pillow's `verify`). SVG validity follows SVG 1.1: well-formed XML whose
root is `svg` in the http://www.w3.org/2000/svg namespace.
"""

from __future__ import annotations

import io
import os
import struct
import subprocess
import sys
import xml.etree.ElementTree as ET

import pytest
from PIL import Image

from aftercast.notify import ChartData
from aftercast.notify.charts import render_band_chart, render_band_chart_svg
from tests.servers import NASTY_SERIES_ID, mismatched_chart, sample_notification

SVG_NS = "{http://www.w3.org/2000/svg}"


def chart(series_id: str = "store-17") -> ChartData:
    return sample_notification(series_id=series_id).charts[0]


def test_png_is_valid_and_phone_sized() -> None:
    png = render_band_chart(chart())
    assert png[:8] == b"\x89PNG\r\n\x1a\n"  # PNG spec 5.2 signature
    length, kind = struct.unpack(">I4s", png[8:16])
    assert kind == b"IHDR" and length == 13  # PNG spec 11.2.2: IHDR first, 13 bytes
    width, height = struct.unpack(">II", png[16:24])
    with Image.open(io.BytesIO(png)) as image:
        image.verify()  # Pillow re-reads every chunk and checks its CRC
    with Image.open(io.BytesIO(png)) as image:
        assert image.size == (width, height)
        colours = image.convert("RGB").getcolors(maxcolors=1 << 20) or []
        assert len(colours) > 10  # something was drawn, not a blank canvas
    # Common practice for mail images: wide enough to read, narrower than a 640px column.
    assert 400 <= width <= 640 and 200 <= height <= 480


def test_svg_is_inline_ready_and_escapes_user_text() -> None:
    svg = render_band_chart_svg(chart(series_id=NASTY_SERIES_ID + " $x^2$"))
    assert svg.startswith("<svg")  # no XML prolog or DOCTYPE: can sit inside an HTML page
    root = ET.fromstring(svg)  # stdlib XML parser: well-formed or it raises
    assert root.tag == f"{SVG_NS}svg"
    assert not root.findall(f".//{SVG_NS}script")
    texts = "".join(root.itertext())
    # The id is shown as written: not markup, and "$...$" not taken for mathtext.
    assert NASTY_SERIES_ID + " $x^2$" in texts


def test_empty_and_gappy_data_still_draw() -> None:
    empty = ChartData(
        series_id="s", model="m", level=95, times=[], actual=[], point=[], lower=[], upper=[]
    )
    gappy = ChartData(
        series_id="s",
        model="m",
        level=80,
        times=["2024-01-01T00:00:00Z", "2024-01-02T00:00:00+00:00", "2024-01-03"],
        actual=[None, 5.0, None],
        point=[4.0, None, 4.0],
        lower=[3.0, 3.0, None],
        upper=[5.0, 5.5, None],
        coverage_times=["2024-01-03T00:00:00Z"],
        coverage=[None],
    )
    for data in (empty, gappy):
        with Image.open(io.BytesIO(render_band_chart(data))) as image:
            image.verify()
        ET.fromstring(render_band_chart_svg(data))


def test_mismatched_lengths_are_refused() -> None:
    with pytest.raises(ValueError, match="actual"):
        render_band_chart(mismatched_chart())


def test_agg_backend_even_when_the_environment_asks_for_a_display() -> None:
    # matplotlib documents MPLBACKEND as the environment override; ours must win over it.
    env = {**os.environ, "MPLBACKEND": "TkAgg", "DISPLAY": ""}
    code = "import aftercast.notify.charts, matplotlib; print(matplotlib.get_backend())"
    result = subprocess.run(
        [sys.executable, "-c", code],
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
        check=True,
    )
    assert result.stdout.strip().lower() == "agg"


@pytest.mark.parametrize("days", [1, 2, 4, 5, 9, 30, 400])
def test_time_axis_is_labelled_without_falling_back(days: int) -> None:
    """Spans of a few days left matplotlib's date locator (default: at least 5 ticks) with no
    interval to choose: it warned and fell back to a tick every 12 hours. Every span, a single
    day included, gets ticks of its own choosing, the warning turned into an error here."""
    import dataclasses
    import warnings

    times = [f"2026-07-{d:02d}T00:00:00Z" for d in range(1, min(days, 28) + 1)]
    if days > 28:  # a longer span with the same few points
        times = [times[0], f"{2026 + days // 365}-0{1 + days % 365 // 60}-15T00:00:00Z"]
    n = len(times)
    one = dataclasses.replace(
        chart(),
        times=times,
        actual=[10.0 + i for i in range(n)],
        point=[10.0] * n,
        lower=[8.0] * n,
        upper=[12.0] * n,
        coverage_times=times,
        coverage=[1.0] * n,
    )
    with warnings.catch_warnings():
        warnings.simplefilter("error", UserWarning)
        svg = render_band_chart_svg(one)
    assert ET.fromstring(svg).tag == f"{SVG_NS}svg"
