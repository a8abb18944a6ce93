"""Tests of hopwell.flow against torch autograd, finite differences, scipy and known densities."""

import math
import pickle

import numpy as np
import pytest
import torch
from scipy import integrate, stats

from hopwell.flow import ConformerFlow, InternalBase, pack, reduced_energy, unpack
from hopwell.internal import (InternalCoords, build_zmatrix, cartesian_to_internal,
                              internal_to_cartesian)
from hopwell.systems.builder import build

torch.set_num_threads(1)

CHAIN = build_zmatrix(5, [(0, 1), (1, 2), (2, 3), (3, 4)])  # 4 bonds, 3 angles, 2 torsions


def _coords(x: np.ndarray, n_atoms: int) -> InternalCoords:
    bonds, angles, torsions = unpack(torch.as_tensor(x, dtype=torch.float64), n_atoms)
    return InternalCoords(bonds, angles, torsions, torch.zeros(len(x), dtype=torch.float64))


def _two_well_chain(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Draws (n, 9) from a known density on the 5-atom chain, and its log-density (scipy).

    Torsion 0 is a two-well von Mises mixture, torsion 1 follows torsion 0, angle 0 follows
    cos(torsion 0) and angle 2 follows sin(torsion 1); bonds are independent Gaussians. The
    Gaussians lie over 20 widths inside their valid range, so truncation is negligible.
    """
    rng = np.random.default_rng(seed)
    well = rng.random(n) < 0.6
    phi0 = np.where(well, rng.vonmises(-1.2, 4.0, n), rng.vonmises(2.0, 8.0, n))
    phi1 = np.angle(np.exp(1j * (phi0 + 1.5 + rng.vonmises(0.0, 3.0, n))))
    angle_mean = np.stack([1.9 + 0.15 * np.cos(phi0), np.full(n, 2.0), 1.8 - 0.1 * np.sin(phi1)], 1)
    angle_width = np.array([0.03, 0.05, 0.04])
    bonds = 0.15 + 0.01 * rng.standard_normal((n, 4))
    angles = angle_mean + angle_width * rng.standard_normal((n, 3))
    log_density = (stats.norm.logpdf(bonds, 0.15, 0.01).sum(1)
                   + stats.norm.logpdf(angles, angle_mean, angle_width).sum(1)
                   + np.logaddexp(np.log(0.6) + stats.vonmises.logpdf(phi0, 4.0, loc=-1.2),
                                  np.log(0.4) + stats.vonmises.logpdf(phi0, 8.0, loc=2.0))
                   + stats.vonmises.logpdf(phi1, 3.0, loc=phi0 + 1.5))
    torsions = np.stack([phi0, phi1], 1)
    torsions = np.where(torsions >= math.pi, torsions - 2 * math.pi, torsions)
    return np.concatenate([bonds, angles, torsions], 1), log_density


def _perturb(flow: ConformerFlow, scale: float, seed: int) -> ConformerFlow:
    """Random parameters, so that every spline is far from the identity."""
    generator = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for p in flow.parameters():
            p.add_(scale * torch.randn(p.shape, generator=generator, dtype=p.dtype))
    return flow


@pytest.fixture(scope="module")
def butane():
    """Butane: Z-matrix with torsion offsets, seed conformers as features, a physics base."""
    molsys = build("CCCC")
    mol = molsys.mol
    bonds = [(b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()]
    zmat = build_zmatrix(mol.GetNumAtoms(), bonds, [a.GetAtomicNum() > 1 for a in mol.GetAtoms()],
                         molsys.rotatable_bonds())
    coords = cartesian_to_internal(zmat, molsys.seeds_nm)
    return zmat, pack(coords), InternalBase.fit(coords, zmat.is_principal)


@pytest.fixture(scope="module")
def chain_flow():
    x, _ = _two_well_chain(500, seed=1)
    base = InternalBase.fit(_coords(x, 5), CHAIN.is_principal)
    torch.manual_seed(0)
    flow = ConformerFlow.for_zmatrix(CHAIN, base, hidden=16, layers=6, bins=6)
    return _perturb(flow, 0.3, seed=2), x


# --- base ---------------------------------------------------------------------------------------

def _single_torsion_base() -> InternalBase:
    """A 4-atom base whose truncation matters: a short bond near 0 nm, an angle near pi."""
    mean = torch.tensor([0.05, 0.15, 0.11, 3.0, 1.9], dtype=torch.float64)
    width = torch.tensor([0.03, 0.01, 0.01, 0.2, 0.05], dtype=torch.float64)
    loc = torch.tensor([[-2.5, 0.4, 3.0]], dtype=torch.float64)
    kappa = torch.tensor([[3.0, 12.0, 0.5]], dtype=torch.float64)
    weight = 0.95 * torch.tensor([[0.5, 0.3, 0.2]], dtype=torch.float64)
    return InternalBase(mean, width, loc, kappa, weight, uniform_weight=0.05)


def _truncnorm_args(base: InternalBase):
    mean, width = base.mean.numpy(), base.width.numpy()
    return ((base.lower.numpy() - mean) / width, (base.upper.numpy() - mean) / width, mean, width)


def test_base_gaussians_match_scipy_truncnorm_and_mixture_normalizes():
    base = _single_torsion_base()
    a, b, mean, width = _truncnorm_args(base)
    x = base.sample(200, torch.Generator().manual_seed(3))
    # Source: scipy.stats.truncnorm, the exact truncated-Gaussian log-density.
    gauss = stats.truncnorm.logpdf(x[:, :5].numpy(), a, b, loc=mean, scale=width).sum(1)
    torsion_part = base.log_prob(x).numpy() - gauss
    # Source: closed form of the mixture with scipy.stats.vonmises.
    expected = np.log(0.05 / (2 * np.pi) + sum(
        0.95 * w * stats.vonmises.pdf(x[:, 5].numpy(), k, loc=m)
        for w, k, m in [(0.5, 3.0, -2.5), (0.3, 12.0, 0.4), (0.2, 0.5, 3.0)]))
    np.testing.assert_allclose(torsion_part, expected, atol=1e-10)

    def density(phi):
        y = x[:1].clone()
        y[0, 5] = phi
        return math.exp(float(base.log_prob(y)) - gauss[0])

    # Source: scipy.integrate.quad over the circle.
    total, _ = integrate.quad(density, -math.pi, math.pi, limit=200)
    assert total == pytest.approx(1.0, abs=1e-8)
    # Outside the valid range the density is zero.
    y = x[:1].clone()
    y[0, 0] = -0.01
    assert float(base.log_prob(y)) == -math.inf


def test_base_samples_follow_its_density():
    base = _single_torsion_base()
    x = base.sample(4000, torch.Generator().manual_seed(4)).numpy()
    a, b, mean, width = _truncnorm_args(base)
    # Source: scipy.stats.kstest against scipy's truncated-normal CDF.
    for j in range(5):
        exact = stats.truncnorm(a[j], b[j], loc=mean[j], scale=width[j])
        assert stats.kstest(x[:, j], exact.cdf).pvalue > 1e-3

    def mixture_cdf(phi):
        # scipy.stats.vonmises.cdf is cumulative over the real line; measure from -pi.
        return 0.05 * (phi + np.pi) / (2 * np.pi) + sum(
            0.95 * w * (stats.vonmises.cdf(phi, k, loc=m) - stats.vonmises.cdf(-np.pi, k, loc=m))
            for w, k, m in [(0.5, 3.0, -2.5), (0.3, 12.0, 0.4), (0.2, 0.5, 3.0)])

    assert np.all((x[:, 5] >= -np.pi) & (x[:, 5] < np.pi))
    assert stats.kstest(x[:, 5], mixture_cdf).pvalue > 1e-3


def test_base_fit_recovers_a_two_well_torsion():
    rng = np.random.default_rng(5)

    def draw(n):
        well = rng.random(n) < 0.7
        phi = np.where(well, rng.vonmises(-1.0, 8.0, n), rng.vonmises(2.0, 20.0, n))
        x = np.concatenate([0.15 + 0.005 * rng.standard_normal((n, 3)),
                            1.9 + 0.04 * rng.standard_normal((n, 2)), phi[:, None]], 1)
        true = np.logaddexp(np.log(0.7) + stats.vonmises.logpdf(phi, 8.0, loc=-1.0),
                            np.log(0.3) + stats.vonmises.logpdf(phi, 20.0, loc=2.0))
        return x, true

    x_train, _ = draw(4000)
    x_test, true_log_density = draw(4000)
    base = InternalBase.fit(_coords(x_train, 4))
    a, b, mean, width = _truncnorm_args(base)
    fitted = base.log_prob(torch.as_tensor(x_test)).numpy() - stats.truncnorm.logpdf(
        x_test[:, :5], a, b, loc=mean, scale=width).sum(1)
    # Source: the true density (scipy.stats.vonmises). The 5% uniform floor alone costs about
    # -log(0.95) = 0.05 nats; the fit must come within 0.1 nats of the truth.
    gap = true_log_density.mean() - fitted.mean()
    assert 0.0 < gap < 0.1
    np.testing.assert_allclose(mean, x_train[:, :5].mean(0))
    np.testing.assert_allclose(width, [0.005] * 3 + [0.04] * 2, rtol=0.05)  # the draws' widths


def test_plain_base_has_uniform_torsions_and_wider_gaussians():
    x, _ = _two_well_chain(300, seed=6)
    physics = InternalBase.fit(_coords(x, 5))
    plain = InternalBase.fit(_coords(x, 5), plain=True)
    assert torch.allclose(plain.width, 2.0 * physics.width)
    a, b, mean, width = _truncnorm_args(plain)
    gauss = stats.truncnorm.logpdf(x[:, :7], a, b, loc=mean, scale=width).sum(1)
    # Source: the uniform density on the circle, 1 / (2 pi) per torsion.
    np.testing.assert_allclose(plain.log_prob(torch.as_tensor(x)).numpy() - gauss,
                               -2 * np.log(2 * np.pi), atol=1e-10)


# --- flow ---------------------------------------------------------------------------------------

def test_log_prob_is_base_plus_autograd_log_det(chain_flow):
    flow, x = chain_flow
    x = torch.as_tensor(x[:5])
    log_q = flow.log_prob(x).detach()
    for i in range(len(x)):
        # Source: torch.autograd.functional.jacobian of the map to the base.
        jac = torch.autograd.functional.jacobian(lambda v: flow.to_base(v[None])[0][0], x[i])
        u = flow.to_base(x[i:i + 1])[0].detach()
        expected = flow.base.log_prob(u) + torch.linalg.slogdet(jac)[1]
        assert float(log_q[i]) == pytest.approx(float(expected), abs=1e-9)
        # The generative direction reports log |det du/dx| at its output.
        jac_inv = torch.autograd.functional.jacobian(lambda v: flow.from_base(v[None])[0][0], u[0])
        with torch.no_grad():
            x_back, ladj = flow.from_base(u)
        assert torch.allclose(x_back, x[i:i + 1], atol=1e-10)
        assert float(ladj) == pytest.approx(-float(torch.linalg.slogdet(jac_inv)[1]), abs=1e-9)
    assert float((log_q - flow.base.log_prob(x)).abs().max()) > 0.1  # the flow is not the identity


def test_sample_log_q_equals_log_prob(butane):
    zmat, x_seeds, base = butane
    torch.manual_seed(0)
    flow = _perturb(ConformerFlow.for_zmatrix(zmat, base, hidden=32, layers=6), 0.1, seed=7)
    x, log_q = flow.sample(500, torch.Generator().manual_seed(8))
    assert log_q.dtype == torch.float64 and x.shape == (500, 3 * zmat.n_atoms - 6)
    np.testing.assert_allclose(log_q.numpy(), flow.log_prob(x).detach().numpy(), atol=1e-6)
    bonds, angles, torsions = unpack(x, zmat.n_atoms)
    assert torch.all(bonds > 0) and torch.all((angles > 0) & (angles < math.pi))


def test_circular_torsions_stay_in_range_and_density_is_continuous(chain_flow):
    flow, x = chain_flow
    torsions = flow.sample(2000, torch.Generator().manual_seed(9))[0][:, 7:]
    assert torch.all((torsions >= -math.pi) & (torsions < math.pi))
    # Source: the boundary condition of Rezende et al. 2020 (equal end derivatives of the
    # circular spline) makes the density continuous across -pi / pi.
    eps = 1e-7
    y = torch.as_tensor(x[:20]).repeat(3, 1)
    for j in (7, 8):
        z = y.clone()
        z[:20, j], z[20:40, j], z[40:, j] = -math.pi + eps, math.pi - eps, 0.0
        log_q = flow.log_prob(z).detach()
        np.testing.assert_allclose(log_q[:20].numpy(), log_q[20:40].numpy(), atol=1e-4)
        assert float((log_q[:20] - log_q[40:]).abs().max()) > 0.1  # the test point matters


def test_torsion_sets_alternate_within_each_branch_group(butane):
    zmat, _, base = butane
    half = np.array(ConformerFlow.for_zmatrix(zmat, base).config["torsion_half"])
    group = np.where(zmat.is_principal, np.arange(len(half)), zmat.principal_of)
    assert np.any(~zmat.is_principal)
    for g in np.flatnonzero(zmat.is_principal):
        members = half[group == g]
        assert np.all(members[1:] != members[:-1])
    principal = half[zmat.is_principal]
    assert np.all(principal[1:] != principal[:-1])


def test_untrained_flow_equals_its_base(butane):
    zmat, x_seeds, base = butane
    flow = ConformerFlow.for_zmatrix(zmat, base, hidden=32, layers=6)
    x = torch.cat([x_seeds, base.sample(200, torch.Generator().manual_seed(10))])
    np.testing.assert_allclose(flow.log_prob(x).detach().numpy(), base.log_prob(x).numpy(),
                               atol=1e-10)


def test_training_approaches_the_true_density():
    x_train, _ = _two_well_chain(4000, seed=11)
    x_test, true_log_density = _two_well_chain(3000, seed=12)
    base = InternalBase.fit(_coords(x_train, 5), CHAIN.is_principal)
    torch.manual_seed(13)
    flow = ConformerFlow.for_zmatrix(CHAIN, base, hidden=32, layers=6, bins=8)
    optimizer = torch.optim.Adam(flow.parameters(), lr=5e-3)
    generator = torch.Generator().manual_seed(14)
    x_train, x_test = torch.as_tensor(x_train), torch.as_tensor(x_test)
    for _ in range(200):
        flow.fit_step(optimizer, x_train[torch.randint(len(x_train), (256,), generator=generator)])
    with torch.no_grad():
        base_ll = float(base.log_prob(x_test).mean())
        flow_ll = float(flow.log_prob(x_test).mean())
    # Source: the true density of the draws (scipy.stats); the base misses the correlations.
    true_ll = float(true_log_density.mean())
    assert true_ll - base_ll > 1.0
    assert flow_ll - base_ll > 0.7 * (true_ll - base_ll)
    assert flow_ll < true_ll + 0.05


@pytest.mark.parametrize("weights", ["zero_half", "integer"])
def test_weighted_fit_equals_fit_of_reweighted_data(weights):
    x, _ = _two_well_chain(200, seed=15)
    x = torch.as_tensor(x)
    base = InternalBase.fit(_coords(x.numpy(), 5), CHAIN.is_principal)
    if weights == "zero_half":
        w = torch.cat([torch.ones(100), torch.zeros(100)]).double()
        x_equivalent = x[:100]
    else:
        w = torch.tensor([1.0, 2.0, 3.0, 0.0]).double().repeat(50)
        x_equivalent = torch.repeat_interleave(x, w.long(), dim=0)
    flows = []
    for data, wts in [(x, w), (x_equivalent, None)]:
        torch.manual_seed(16)
        flow = ConformerFlow.for_zmatrix(CHAIN, base, hidden=16, layers=3)
        optimizer = torch.optim.Adam(flow.parameters(), lr=1e-2)
        for _ in range(15):
            flow.fit_step(optimizer, data, wts)
        flows.append(flow)
    with torch.no_grad():
        a, b = flows[0].log_prob(x), flows[1].log_prob(x)
        assert float((a - base.log_prob(x)).abs().max()) > 0.01  # training moved the flow
    np.testing.assert_allclose(a.numpy(), b.numpy(), atol=1e-8)


def test_save_load_round_trip(chain_flow, tmp_path):
    flow, x = chain_flow
    flow.save(tmp_path / "flow.pt")
    torch.manual_seed(17)
    fresh = ConformerFlow.for_zmatrix(CHAIN, flow.base, hidden=16, layers=6, bins=6)
    x = torch.as_tensor(x[:50])
    assert not torch.equal(fresh.log_prob(x), flow.log_prob(x))
    assert torch.equal(fresh.load(tmp_path / "flow.pt").log_prob(x), flow.log_prob(x))
    with pytest.raises(ValueError, match="configuration"):
        other = ConformerFlow.for_zmatrix(CHAIN, flow.base, hidden=8, layers=6, bins=6)
        other.load(tmp_path / "flow.pt")
    # torch.load(weights_only=True) refuses pickled objects other than tensors and containers.
    unsafe = {"config": fresh.config, "state": fresh.state_dict(),
              "extra": np.random.default_rng(0)}
    torch.save(unsafe, tmp_path / "unsafe.pt")
    with pytest.raises(pickle.UnpicklingError):
        fresh.load(tmp_path / "unsafe.pt")


# --- energies through the Cartesian map ---------------------------------------------------------

def _spring_energy(pairs: np.ndarray, k: float, r0_nm: float):
    """u = sum over pairs of k/2 (r - r0)^2, with its analytic forces (numpy callback)."""

    def energy_fn(positions_nm):
        d = positions_nm[:, pairs[:, 0]] - positions_nm[:, pairs[:, 1]]
        r = np.linalg.norm(d, axis=-1)
        u = 0.5 * k * ((r - r0_nm) ** 2).sum(1)
        f_pair = -k * ((r - r0_nm) / r)[..., None] * d
        forces = np.zeros_like(positions_nm)
        np.add.at(forces, (slice(None), pairs[:, 0]), f_pair)
        np.add.at(forces, (slice(None), pairs[:, 1]), -f_pair)
        return u, forces

    def energy_torch(positions_nm):
        r = torch.linalg.norm(positions_nm[:, pairs[:, 0]] - positions_nm[:, pairs[:, 1]], dim=-1)
        return 0.5 * k * ((r - r0_nm) ** 2).sum(1)

    return energy_fn, energy_torch


def test_reduced_energy_gradient_matches_finite_differences(butane):
    zmat, x_seeds, _ = butane
    pairs = np.array([(i, j) for i in range(zmat.n_atoms) for j in range(i + 3, zmat.n_atoms)])
    energy_fn, _ = _spring_energy(pairs, k=50.0, r0_nm=0.3)
    x = x_seeds[:2].clone().requires_grad_(True)

    def total(v):
        positions_nm = internal_to_cartesian(zmat, *unpack(v, zmat.n_atoms))[0]
        return reduced_energy(positions_nm, energy_fn).sum()

    grad, = torch.autograd.grad(total(x), x)
    # Source: central finite differences of the energy through the Cartesian map.
    h = 1e-6
    numeric = torch.zeros_like(x)
    with torch.no_grad():
        for i in range(x.shape[0]):
            for j in range(x.shape[1]):
                step = torch.zeros_like(x)
                step[i, j] = h
                numeric[i, j] = (total(x + step) - total(x - step)) / (2 * h)
    assert float(grad.abs().max()) > 1.0
    np.testing.assert_allclose(grad.numpy(), numeric.numpy(), rtol=1e-5, atol=1e-5)


def test_reverse_kl_gradient_matches_autograd(butane):
    zmat, _, base = butane
    pairs = np.array([(i, j) for i in range(zmat.n_atoms) for j in range(i + 3, zmat.n_atoms)])
    energy_fn, energy_torch = _spring_energy(pairs, k=5.0, r0_nm=0.3)
    torch.manual_seed(18)
    flow = _perturb(ConformerFlow.for_zmatrix(zmat, base, hidden=16, layers=3), 0.05, seed=19)
    optimizer = torch.optim.SGD(flow.parameters(), lr=0.0)  # keep the parameters
    loss = flow.reverse_kl_step(optimizer, 64, energy_fn, torch.Generator().manual_seed(20))
    grads = [p.grad.clone() for p in flow.parameters()]
    # Source: torch autograd through the same loss with the energy written in torch.
    flow.zero_grad()
    u = base.sample(64, torch.Generator().manual_seed(20))  # the draws reverse_kl_step made
    x, ladj = flow.from_base(u)
    log_q = base.log_prob(u) + ladj
    positions_nm, log_jacobian = internal_to_cartesian(zmat, *unpack(x, zmat.n_atoms))
    expected = (log_q - log_jacobian + energy_torch(positions_nm)).mean()
    expected.backward()
    torch.nn.utils.clip_grad_norm_(flow.parameters(), 10.0)
    assert loss == pytest.approx(float(expected.detach()), rel=1e-10)
    for g, p in zip(grads, flow.parameters()):
        torch.testing.assert_close(g, p.grad, rtol=1e-8, atol=1e-10)


def test_bad_input_raises(chain_flow):
    flow, x = chain_flow
    with pytest.raises(ValueError):
        flow.log_prob(torch.zeros(3, 8))
    with pytest.raises(ValueError):
        flow.fit_step(torch.optim.SGD(flow.parameters(), lr=0.0), torch.as_tensor(x[:4]),
                      torch.tensor([1.0, -1.0, 1.0, 1.0]))
    with pytest.raises(ValueError):
        ConformerFlow(flow.base, np.ones(3, bool))
    with pytest.raises(ValueError):
        flow.reverse_kl_step(torch.optim.SGD(flow.parameters(), lr=0.0), 4, lambda p: (0, 0))
