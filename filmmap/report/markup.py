"""HTML building blocks every filmmap page shares: escaping and inline PNG images.

Every text that comes from the input files or the history (lot ids, furnaces, wafer ids,
notes, captions) goes through `e`; every image is inline (``data:image/png;base64``), so a
page is one self-contained file with no reference outside it.

References
----------
.. [1] Python documentation, ``html.escape`` and ``base64``.
.. [2] RFC 2397, "The data URL scheme".
"""

from __future__ import annotations

import base64
import html

__all__ = ["data_uri", "e", "img_tag"]


def e(value):
    """Escape any value for HTML text or an attribute (quotes included)."""
    return html.escape(str(value), quote=True)


def data_uri(png):
    """A ``data:image/png;base64,...`` URI of PNG bytes."""
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def img_tag(png, alt, img_id=None, width=None):
    """An ``<img>`` with the PNG inline, its alt text escaped (and an id and a width, px)."""
    attrs = f' id="{e(img_id)}"' if img_id else ""
    attrs += f' width="{int(width)}"' if width else ""
    return f'<img{attrs} alt="{e(alt)}" src="{data_uri(png)}">'
