"""A still picture of a notebook widget, kept beside its live panel (the mixer's and the gallery's).

The CSS class and display-id names keep the ``xrec-mixer-`` prefix they were introduced with.
"""

from __future__ import annotations

import threading
import uuid
from collections.abc import Callable
from typing import Any

__all__ = ["StillPicture"]


def _picture_html(key: str, picture: str) -> str:
    # While the live panel (which carries the class xrec-mixer-live-<key>) is in the same output
    # area, the rule hides the picture; without it (no kernel, model gone) the picture shows.
    rule = f"<style>.jp-OutputArea:has(.xrec-mixer-live-{key}) .xrec-mixer-picture-{key}{{display:none}}</style>"
    return f'{rule}<div class="xrec-mixer-picture-{key}">{picture}</div>'


class StillPicture:
    """A widget's still picture: a second output beside the live panel, kept up to date.

    Front ends that cannot draw the widget (a saved notebook opened without its kernel,
    nbviewer, GitHub) show the picture; JupyterLab hides it while the live panel is drawn.
    Code run in a cell refreshes it at once (:meth:`refresh`); moves made in the page refresh
    it once they pause (:meth:`refresh_later`), so a drag costs the page no extra drawing.

    Parameters
    ----------
    picture, text
        Return the picture's HTML and its plain-text stand-in when called.
    """

    def __init__(self, picture: Callable[[], str], text: Callable[[], str], delay: float = 1.0) -> None:
        self._picture, self._text, self.delay = picture, text, delay
        self.key: str | None = None
        self._timer: threading.Timer | None = None
        self._timer_lock = threading.Lock()

    def _bundle(self) -> dict[str, str]:
        return {"text/html": _picture_html(self.key, self._picture()), "text/plain": self._text()}

    def show(self, widget: Any) -> None:
        """Display ``widget`` and, as a second output, the picture (``display_id`` ``xrec-mixer-<key>``)."""
        from IPython.display import display

        self.key = self.key or uuid.uuid4().hex[:12]
        widget.add_class(f"xrec-mixer-live-{self.key}")
        display(widget)
        display(self._bundle(), raw=True, display_id=f"xrec-mixer-{self.key}")

    def refresh(self) -> None:
        """Replace the shown picture now (an ``update_display_data`` message); nothing before :meth:`show`."""
        from IPython.display import update_display

        with self._timer_lock:
            if self._timer is not None:
                self._timer.cancel()
                self._timer = None
        if self.key is not None:
            update_display(self._bundle(), raw=True, display_id=f"xrec-mixer-{self.key}")

    def refresh_later(self) -> None:
        """Refresh once no further call has come for ``delay`` seconds."""
        if self.key is None:
            return
        with self._timer_lock:
            if self._timer is not None:
                self._timer.cancel()
            self._timer = threading.Timer(self.delay, self.refresh)
            self._timer.daemon = True
            self._timer.start()
