"""The console every command prints through (`registry.cli.common.out` and `err`)."""

from __future__ import annotations

from typing import Any, Literal

from rich.cells import cell_len
from rich.console import Console, ConsoleDimensions, RenderableType
from rich.rule import Rule
from rich.status import Status
from rich.style import Style
from rich.text import Text

# Width of a console whose output is piped or redirected: wider than any real line, so that
# nothing is wrapped or cut, yet finite in case some renderable pads to the full width.
UNBOUNDED = 1_000_000
# A rule (a horizontal line) has no natural width, so off a terminal it gets this one.
RULE_WIDTH = 80


class PlainConsole(Console):
    """A Rich console for priorledger's output: text is never read as markup, and output that
    is not a terminal is never wrapped or truncated.

    Markup, emoji codes and highlighting are off, so a string is printed as it is, wherever
    it comes from (citations, notes, reasons, keys, tags); style goes in explicitly with
    `rich.text.Text` (for example `Text.assemble(("entry 3", "bold"), " revision 2")`).
    When the file is not a terminal the console is unboundedly wide, so table cells are shown
    in full and long lines stay whole; on a terminal the output is Rich's usual layout.
    """

    def __init__(self, *, stderr: bool = False) -> None:
        super().__init__(stderr=stderr, markup=False, emoji=False, highlight=False)

    @property
    def size(self) -> ConsoleDimensions:
        size = super().size
        return size if self.is_terminal else ConsoleDimensions(UNBOUNDED, size.height)

    def rule(
        self,
        title: str | Text = "",
        *,
        characters: str = "─",
        style: str | Style = "rule.line",
        align: Literal["left", "center", "right"] = "center",
    ) -> None:
        """A horizontal line with a title; off a terminal, as wide as a page, title in full."""
        line = Rule(title, characters=characters, style=style, align=align)
        if self.is_terminal:
            self.print(line)
        else:
            self.print(line, width=max(RULE_WIDTH, cell_len(str(title)) + 6))

    def status(self, status: RenderableType, **kwargs: Any) -> Status:
        """A spinner; its text is plain (Rich would read a string's brackets as markup)."""
        return super().status(Text(status) if isinstance(status, str) else status, **kwargs)
