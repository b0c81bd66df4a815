"""Small stand-ins for layout objects, for the pure reading-logic tests."""

from dataclasses import dataclass, field


@dataclass
class FakeField:
    """Has the attributes of formread.form.layout.FieldSpec that the rules and decoder read."""

    name: str
    kind: str = "boxed"
    cells: int | None = 8
    max_digits: int | None = None
    optional: bool = False
    rules: dict = field(default_factory=dict)
    threshold: float | None = None


@dataclass
class FakeLayout:
    """Has the attributes of formread.form.layout.Layout that the rules and decoder read."""

    fields: list
    relations: list = field(default_factory=list)
    threshold: float = 0.9
    source: str = "cards/meter.toml"
