"""Complex activations and ComplexToReal: generic spec checks (elementwise formulas from the
papers, written in NumPy in tests/layer_specs.py), the name table, z = 0, and bad input."""

import pytest
import torch

from layer_specs import GENERIC_CHECKS, specs_for
from phasorgraph import GraphInputError
from phasorgraph.nn import ACTIVATIONS, Cardioid, ComplexToReal, ModReLU, SplitReLU, complex_activation



@pytest.mark.parametrize("check", GENERIC_CHECKS, ids=lambda f: f.__name__)
@pytest.mark.parametrize("spec", specs_for("complex"), ids=str)
def test_generic(spec, check):
    check(spec)


def test_name_table_builds_every_activation():
    assert sorted(ACTIVATIONS) == ["cardioid", "modrelu", "real_part_gate", "split_relu", "zrelu"]
    for name, cls in ACTIVATIONS.items():
        kwargs = {"num_features": 3} if cls is ModReLU else {}
        assert isinstance(complex_activation(name, **kwargs), cls)


def test_unknown_activation_name_lists_the_names():
    with pytest.raises(GraphInputError, match=r"name must be one of \['cardioid', 'modrelu', 'real_part_gate', "
                                              r"'split_relu', 'zrelu'\].*got 'crelu'"):
        complex_activation("crelu")
    with pytest.raises(GraphInputError, match=r"name 'modrelu' needs num_features"):
        complex_activation("modrelu")


@pytest.mark.parametrize("make", [lambda: ModReLU(2), *[(lambda c: (lambda: c()))(c) for name, c in ACTIVATIONS.items()
                                                         if name != "modrelu"],
                                  lambda: ComplexToReal("cartesian"), lambda: ComplexToReal("modulus"),
                                  lambda: ComplexToReal("polar")])
def test_zero_input_gives_finite_values_and_gradients(make):
    layer = make().double()
    z = torch.zeros(3, 2, dtype=torch.complex128, requires_grad=True)
    out = layer(z)
    assert torch.isfinite(torch.view_as_real(out) if out.is_complex() else out).all()
    (out.abs().sum() if out.is_complex() else out.sum()).backward()
    assert torch.isfinite(torch.view_as_real(z.grad)).all()


def test_modrelu_keeps_the_phase_and_thresholds_the_modulus():
    act = ModReLU(1, dtype=torch.float64)
    with torch.no_grad():
        act.bias.fill_(-1.0)
    z = torch.tensor([[2 * torch.exp(torch.tensor(0.7j)).item()], [0.5 + 0j]], dtype=torch.complex128)
    out = act(z)
    # closed form: |f(z)| = max(|z| - 1, 0), angle unchanged
    torch.testing.assert_close(out.abs(), torch.tensor([[1.0], [0.0]], dtype=torch.float64))
    assert float(torch.angle(out[0, 0].detach())) == pytest.approx(0.7)


def test_cardioid_is_identity_on_positive_reals_and_zero_on_negative_reals():
    z = torch.tensor([3.0 + 0j, -3.0 + 0j], dtype=torch.complex128)
    torch.testing.assert_close(Cardioid()(z), torch.tensor([3.0 + 0j, 0j], dtype=torch.complex128))


def test_cartesian_layout_is_real_parts_then_imaginary_parts():
    z = torch.tensor([[1 + 2j, 3 + 4j, 5 + 6j]])
    assert ComplexToReal()(z).tolist() == [[1.0, 3.0, 5.0, 2.0, 4.0, 6.0]]
    assert ComplexToReal("polar")(z).shape == (1, 6)
    assert ComplexToReal("modulus")(z).dtype == torch.float32


def test_real_input_is_refused():
    with pytest.raises(GraphInputError, match=r"z must be complex .*for SplitReLU; got torch.float32"):
        SplitReLU()(torch.ones(2, 2))
    with pytest.raises(GraphInputError, match=r"z must be complex .*for ComplexToReal; got torch.float64"):
        ComplexToReal()(torch.ones(2, 2, dtype=torch.float64))


def test_other_bad_arguments():
    with pytest.raises(GraphInputError, match=r"mode must be one of \('cartesian', 'modulus', 'polar'\); got 'angle'"):
        ComplexToReal("angle")
    with pytest.raises(GraphInputError, match=r"z must have num_features = 3 entries on its last axis; got shape \(2, 4\)"):
        ModReLU(3)(torch.ones(2, 4, dtype=torch.complex64))
    with pytest.raises(GraphInputError, match=r"num_features must be an integer >= 1; got 0"):
        ModReLU(0)
