"""Where `bandwatch view` writes: in place on an ANSI terminal, or one plain
line at a time anywhere else (a pipe, a file, a dumb terminal).

On a terminal (stdout a tty, TERM set and not "dumb") the screen is redrawn
in place with ECMA-48 cursor home and erase and the VT220 cursor hide/show;
colour is added unless NO_COLOR is set. Elsewhere no escape code is written.
A closed pipe or a lost terminal stops the view.
"""

import shutil
import threading
from typing import Mapping, TextIO, Tuple

from .view_render import RESET, Snapshot, plain_line, render

# ECMA-48 control sequences, and DECTCEM (VT220) to hide and show the cursor.
HOME = "\x1b[H"
CLEAR_EOL = "\x1b[K"
CLEAR_EOS = "\x1b[J"
CLEAR_SCREEN = "\x1b[2J"
HIDE_CURSOR = "\x1b[?25l"
SHOW_CURSOR = "\x1b[?25h"


class Output:
    """Writes to the view's stream; a closed pipe or a lost terminal stops the view."""

    def __init__(self, out: TextIO, stop: threading.Event) -> None:
        self.out = out
        self.stop = stop
        self.broken = False

    def write(self, text: str) -> None:
        if self.broken:
            return
        try:
            try:
                self.out.write(text)
            except UnicodeEncodeError:  # "µm" on a terminal that cannot show it
                encoding = getattr(self.out, "encoding", None) or "ascii"
                self.out.write(text.encode(encoding, "replace").decode(encoding))
            self.out.flush()
        except OSError:
            self.broken = True
            self.stop.set()

    def begin(self) -> None:
        pass

    def show(self, snap: Snapshot) -> None:
        self.write(plain_line(snap) + "\n")

    def end(self) -> None:
        pass


class Screen(Output):
    """In-place redraw on an ANSI terminal."""

    def __init__(self, out: TextIO, stop: threading.Event, colour: bool) -> None:
        super().__init__(out, stop)
        self.colour = colour

    def begin(self) -> None:
        self.write(HIDE_CURSOR + CLEAR_SCREEN + HOME)

    def show(self, snap: Snapshot) -> None:
        cols, rows = shutil.get_terminal_size()
        # One column spare: erasing to the end of the line from the last
        # column would erase the character just written there.
        lines = render(snap, max(20, cols - 1), self.colour)[: max(1, rows)]
        self.write(HOME + (CLEAR_EOL + "\n").join(lines) + CLEAR_EOL + CLEAR_EOS)

    def end(self) -> None:
        self.write((RESET if self.colour else "") + SHOW_CURSOR + "\n")


def modes(out: TextIO, environ: Mapping[str, str]) -> Tuple[bool, bool]:
    """(redraw in place, colour) for this stream and environment."""
    try:
        tty = out.isatty()
    except (AttributeError, ValueError):
        tty = False
    screen = tty and environ.get("TERM", "") not in ("", "dumb")
    # no-color.org: NO_COLOR present and not empty turns colour off.
    return screen, screen and not environ.get("NO_COLOR")
