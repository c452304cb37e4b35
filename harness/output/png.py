"""PNG: a matplotlib figure as image bytes, the one way every report picture is saved."""

from __future__ import annotations

import io


def png_bytes(fig) -> bytes:
    """A figure as PNG bytes, trimmed to what is drawn (titles and legends are not cut off); closes the figure."""
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight")
    plt.close(fig)
    return buf.getvalue()
