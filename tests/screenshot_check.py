"""Check a headless-browser screenshot of report.html: the charts rendered.

Passes when the page is not blank (at least 3% of pixels are not near-white) and the
report's palette colours appear in it (cluster 1 blue #0072B2, cluster 2 orange #E69F00,
cluster 3 green #009E73), which only the SVG charts and the table swatches draw.
Run: python screenshot_check.py SCREENSHOT.png
"""
import sys

import numpy as np
from PIL import Image

px = np.asarray(Image.open(sys.argv[1]).convert("RGB")).astype(int)
h, w, _ = px.shape
ink = float((px.min(axis=2) < 235).mean())
wanted = {"blue": (0x00, 0x72, 0xB2), "orange": (0xE6, 0x9F, 0x00), "green": (0x00, 0x9E, 0x73)}
seen = {name: int((np.abs(px - np.array(rgb)).max(axis=2) <= 6).sum()) for name, rgb in wanted.items()}
print(f"screenshot {w}x{h}: {100 * ink:.1f}% inked; palette pixels {seen}")
if ink < 0.03 or min(seen.values()) < 200:
    sys.exit("the report's charts did not render")
