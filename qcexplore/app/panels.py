"""The places of a view in the explorer: its tab (:class:`Panel`) and its figures
(:class:`FigureSlot`, built once and then refreshed in place)."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import ipywidgets as widgets
from bokeh.models import LayoutDOM
from jupyter_bokeh import BokehModel

from qcexplore import draw
from qcexplore.app.controls import OptionControls, styled
from qcexplore.views.base import View


@dataclass
class FigureSlot:
    """One bokeh figure place in the widget: figures are built once, then refreshed in place.

    A few built layouts are kept (each in its own BokehModel), one per layout shape
    (for example the overlay split by crew and the one split by shift), so going back
    to a shape seen before swaps the shown model and refreshes its data instead of
    building and sending a whole new figure.
    """

    css: str
    keep: int = 6
    in_card: bool = False
    box: widgets.Box = field(init=False)
    built: list[tuple[tuple, LayoutDOM, BokehModel]] = field(default_factory=list)

    def __post_init__(self) -> None:
        self.box = styled(widgets.Box(), f"figure-{self.css}")

    @property
    def layout(self) -> LayoutDOM | None:
        """The layout on show."""
        return self.built[0][1] if self.built else None

    def show(self, result: Any, build: Callable[[], LayoutDOM], options: tuple = ()) -> bool:
        """Put ``result`` on show; returns True when a new figure was built."""
        for i, (opts, layout, model) in enumerate(self.built):
            if opts == options and not draw.needs_rebuild(layout, result):
                draw.refresh(layout, result)
                if i:
                    self.built.insert(0, self.built.pop(i))
                    self.box.children = [model]
                return False
        layout = build()
        model = BokehModel(layout)
        self.built.insert(0, (options, layout, model))
        for _opts, _layout, old in self.built[self.keep :]:
            old.close()
        del self.built[self.keep :]
        self.box.children = [model]
        return True

    def clear(self) -> None:
        """Show nothing (the panel's result is not available)."""
        self.box.children = []
        for _opts, _layout, model in self.built:
            model.close()
        self.built.clear()


@dataclass
class Panel:
    """One view's tab: its option controls, its choice control, figure slots and HTML."""

    view: View
    controls: OptionControls | None
    choice: widgets.Dropdown | None
    text: widgets.HTML
    message: widgets.HTML
    cards: widgets.VBox
    figures: widgets.VBox
    box: widgets.VBox
    slots: dict[str, FigureSlot] = field(default_factory=dict)

    @classmethod
    def of(cls, view: View, extra: list[widgets.Widget]) -> Panel:
        controls = None if view.options_type is None else OptionControls(view.options_type)
        if controls is not None and not controls.widgets:
            controls = None
        choice = None
        if view.choice_label:
            choice = styled(
                widgets.Dropdown(
                    description=view.choice_label, options=[], style={"description_width": "130px"}
                ),
                f"{view.name}-choice",
            )
        text = styled(widgets.HTML(value=""), f"{view.name}-text")
        message = styled(widgets.HTML(value=""), f"{view.name}-message")
        cards = styled(widgets.VBox([]), f"{view.name}-cards")
        figures = styled(widgets.VBox([]), f"{view.name}-figures")
        parts = [w for w in (controls.box if controls else None, message, choice) if w]
        box = styled(widgets.VBox([*parts, cards, figures, text, *extra]), f"panel-{view.name}")
        return cls(view, controls, choice, text, message, cards, figures, box)

    def slot(self, name: str, *, in_card: bool = False) -> FigureSlot:
        """The figure place of this name, made on first use, in the order first asked for
        (a card's figure sits in its card, not in the figure column)."""
        if name not in self.slots:
            self.slots[name] = FigureSlot(name, in_card=in_card)
            self.figures.children = [s.box for s in self.slots.values() if not s.in_card]
        return self.slots[name]
