"""The one exception family of phasorgraph."""

__all__ = ["GraphInputError"]


class GraphInputError(ValueError):
    """Bad input to a phasorgraph function or layer.

    Every message names the argument, says what was wrong and what is accepted, e.g.
    ``"source holds node 12 but num_nodes is 10"``. It subclasses :class:`ValueError`, so
    code that already catches ``ValueError`` keeps working.
    """


def _value_text(value, limit: int = 80) -> str:
    """``repr(value)`` shortened to ``limit`` characters: how messages show the value given."""
    text = repr(value)
    return text if len(text) <= limit else text[:limit - 3] + "..."
