"""Undo and redo of the user's edits as swaps of frozen dataclasses.

Every edit of the disk geometry or the slits is one :class:`StateCommand`
holding the state before and after; undo and redo hand the stored state back
to the controller. Because the states are immutable, nothing is recomputed to
undo an edit and no edit can be half-undone.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

from PySide6.QtGui import QUndoCommand

__all__ = ["EditState", "StateCommand"]


@dataclass(frozen=True)
class EditState:
    """The part of the controller's state the user edits by hand.

    Attributes
    ----------
    geometry : DiskGeometry or None
    slits : SlitSet or None
    selected : int
        Index of the selected slit (-1 for none).
    """

    geometry: Any
    slits: Any
    selected: int = -1


class StateCommand(QUndoCommand):
    """Swap between two :class:`EditState` values.

    Parameters
    ----------
    text : str
        Shown in the Edit menu ("Undo move slit 3").
    before, after : EditState
    apply : callable
        ``apply(state)`` installs a state in the controller.
    """

    def __init__(self, text: str, before: EditState, after: EditState,
                 apply: Callable[[EditState], None]) -> None:
        super().__init__(text)
        self.before = before
        self.after = after
        self._apply = apply

    def redo(self) -> None:
        self._apply(self.after)

    def undo(self) -> None:
        self._apply(self.before)
