"""SPICE cards: a netlist's physical lines read as the cards the simulator sees."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Card:
    """One SPICE card: its physical lines joined (continuations start with ``+``), runs of
    white space made one, ``$`` comments cut."""

    text: str
    lines: tuple[tuple[int, int], ...]  # (offset in ``text``, 1-based physical line) per part

    @property
    def line(self) -> int:
        return self.lines[0][1]

    def line_at(self, offset: int) -> int:
        """The physical line holding ``text[offset]``."""
        return max(n for start, n in self.lines if start <= offset)


def spice_cards(text: str) -> list[Card]:
    """Every card of a SPICE text, comment lines and blank lines left out: the one reading of
    continuation lines the netlist check, the plausibility bounds and the error locator share."""
    cards: list[Card] = []
    for number, raw in enumerate(text.splitlines(), 1):
        body = " ".join(raw.split("$")[0].split())
        if body.startswith("+") and cards:
            last = cards[-1]
            part = body[1:].strip()
            cards[-1] = Card(f"{last.text} {part}", (*last.lines, (len(last.text) + 1, number)))
        elif body and not body.startswith("*"):
            cards.append(Card(body, ((0, number),)))
    return cards
