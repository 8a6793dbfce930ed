"""Box reduction by an independent library: Pillow's Image.reduce(factor).

Usage: pillow_reduce.py IN.png FACTOR OUT.png
Image.reduce averages each factor x factor box; boxes at the right and bottom edges
that extend past the image average only the pixels present (Pillow's reduce
documentation: "the size of the resulting image is rounded up").
"""
import sys

from PIL import Image

src, factor, dst = sys.argv[1], int(sys.argv[2]), sys.argv[3]
Image.open(src).convert("RGB").reduce(factor).save(dst)
