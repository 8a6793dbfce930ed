"""EXIF orientation by an independent library: Pillow's ImageOps.exif_transpose.

Usage: exif_transpose.py OUT_DIR
Writes, for each EXIF orientation 1 to 8, `o{N}.jpg` (the same stored pixels tagged with
orientation N) and `o{N}.png` (what Pillow shows upright, ImageOps.exif_transpose of
the decoded JPEG), so that both sides decode the very same JPEG.
"""
import sys

from PIL import Image, ImageOps

out = sys.argv[1]
# An asymmetric picture: a gradient with a bright block near one corner.
stored = Image.new("RGB", (96, 64))
px = stored.load()
for y in range(64):
    for x in range(96):
        px[x, y] = (x * 2, y * 3, 60)
for y in range(6, 20):
    for x in range(10, 30):
        px[x, y] = (250, 250, 250)
for n in range(1, 9):
    exif = Image.Exif()
    exif[0x0112] = n  # Orientation
    path = f"{out}/o{n}.jpg"
    stored.save(path, quality=95, exif=exif.tobytes())
    ImageOps.exif_transpose(Image.open(path)).convert("RGB").save(f"{out}/o{n}.png")
