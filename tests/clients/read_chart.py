"""Reads the digest chart out of an email, independently of outrider.

  read_chart.py FILE.eml

Finds the image/png part with Python's email package (policy=default),
checks that the HTML part refers to it by cid: (RFC 2392), decodes it with
Pillow, and measures each bar: a run of columns holding bar-coloured
pixels; its height is the most bar-coloured pixels in one of its columns
(a bar of zero events draws nothing and is not counted).
Prints JSON: {"content_id", "width", "height", "bars": [heights...],
"html_refers": bool}.
"""
import email
import email.policy
import io
import json
import sys

from PIL import Image

msg = email.message_from_bytes(open(sys.argv[1], "rb").read(), policy=email.policy.default)
png = None
cid = None
html = ""
for part in msg.walk():
    if part.get_content_type() == "image/png":
        png = part.get_content()
        cid = (part.get("Content-ID") or "").strip("<>")
    elif part.get_content_type() == "text/html":
        html = part.get_content()
if png is None:
    print(json.dumps({"error": "no image/png part"}))
    sys.exit(1)
img = Image.open(io.BytesIO(png)).convert("RGB")
w, h = img.size
px = img.load()
# Bar colours as documented in service/digest/chart.rs (BAR, BAR_ABOVE).
BAR_COLOURS = {(0x2F, 0x5D, 0x50), (0xA8, 0x3F, 0x1E)}
counts = [sum(1 for y in range(h) if px[x, y] in BAR_COLOURS) for x in range(w)]
bars = []
x = 0
while x < w:
    if counts[x] > 0:
        start = x
        while x < w and counts[x] > 0:
            x += 1
        bars.append(max(counts[start:x]))
    else:
        x += 1
print(json.dumps({"content_id": cid, "width": w, "height": h, "bars": bars,
                  "html_refers": ("cid:" + (cid or "")) in html}))
