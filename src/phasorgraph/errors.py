"""The one exception family of phasorgraph."""

__all__ = ["GraphInputError", "PhaseWrapWarning"]


class GraphInputError(ValueError):
    """Bad input to a phasorgraph function or layer.

    Every message names the argument, says what was wrong and what is accepted, e.g.
    ``"source holds node 12 but num_nodes is 10"``. It subclasses :class:`ValueError`, so
    code that already catches ``ValueError`` keeps working.
    """


def value_text(value, limit: int = 80) -> str:
    """``repr(value)`` shortened to ``limit`` characters: how messages show the value given."""
    text = repr(value)
    return text if len(text) <= limit else text[:limit - 3] + "..."


class PhaseWrapWarning(UserWarning):
    r"""The default ``phase="difference"`` met weights large enough to wrap the phase.

    The phase of an edge pair is :math:`\Theta_{uv} = 2\pi q (A_{uv} - A_{vu})`. Once some
    net flow :math:`|A_{uv} - A_{vu}|` exceeds :math:`1 / (2q)` its phase passes :math:`\pi`,
    where a flow u -> v starts to look like a flow v -> u, and net flows that differ by a
    multiple of :math:`1/q` get the same phase. Raised (as a warning) by the magnetic operator
    builders, which say what to do: ``phase="relative"`` (the net-flow fraction, free of units)
    or compressed weights (e.g. ``weight_transform="log1p"`` with a charge small enough).
    """


# the earlier private name, kept so code written against it still imports (use value_text)
_value_text = value_text
