"""LIF transfer functions of one conductance-based cell: noise-free, Siegert, adiabatic.

Rates in Hz, voltages in mV, times in s, conductances in g_leak.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import integrate, special

FB_SHIFT = 1.0326
"""|zeta(1/2)| / sqrt(2): Fourcaud & Brunel (2002, Neural Comput 14:2057) boundary shift per sqrt(tau_syn / tau_m)."""

_NO_RATE = 26.0  # upper Siegert bound (in sigma) beyond which exp(u**2) overflows: rate is 0


def lif_rate_noise_free(mu_mv: float, tau_m_s: float, t_ref_s: float, v_th_mv: float,
                        v_reset_mv: float) -> float:
    """Rate (Hz) of a LIF neuron with constant drive: 1/(t_ref + tau ln((mu-Vr)/(mu-Vth))), 0 below threshold.

    Dayan & Abbott 2001, Theoretical Neuroscience, eq. 5.11 [memory]; ``mu_mv`` is the steady-state
    potential the drive would hold the membrane at without a threshold.
    """
    if mu_mv <= v_th_mv:
        return 0.0
    return 1.0 / (t_ref_s + tau_m_s * math.log((mu_mv - v_reset_mv) / (mu_mv - v_th_mv)))


def _erfcx_neg_integral(lo: float, hi: float) -> float:
    """Integral of erfcx(-u) du from lo to hi (lo <= hi).

    On u <= 0 the integrand is erfcx(|u|) <= 1 and quad is accurate. On u > 0 it is
    2 exp(u^2) - erfcx(u), whose first part integrates to sqrt(pi) erfi(u) in closed form.
    """
    total = 0.0
    if lo < 0.0:
        total += integrate.quad(lambda u: special.erfcx(-u), lo, min(hi, 0.0), limit=200)[0]
    if hi > 0.0:
        a = max(lo, 0.0)
        total += math.sqrt(math.pi) * (special.erfi(hi) - special.erfi(a))
        total -= integrate.quad(special.erfcx, a, hi, limit=200)[0]
    return total


def siegert_rate(mu_mv: float, sigma_mv: float, tau_m_s: float, t_ref_s: float, v_th_mv: float,
                 v_reset_mv: float, tau_syn_s: float = 0.0) -> float:
    """Rate (Hz) of a LIF neuron driven by white noise (Siegert; Amit & Brunel 1997; Brunel 2000).

    Convention ``tau dV/dt = -V + mu + sigma sqrt(tau) xi``::

        1/r = t_ref + tau sqrt(pi) * int_{(Vr-mu)/sigma}^{(Vth-mu)/sigma} erfcx(-u) du

    ``tau_syn_s > 0`` applies the Fourcaud & Brunel (2002) correction for synaptic filtering:
    both bounds shift by 1.0326 sqrt(tau_syn/tau_m). ``sigma_mv <= 0`` gives the noise-free rate.
    """
    if sigma_mv <= 0.0:
        return lif_rate_noise_free(mu_mv, tau_m_s, t_ref_s, v_th_mv, v_reset_mv)
    shift = FB_SHIFT * math.sqrt(tau_syn_s / tau_m_s)
    hi = (v_th_mv - mu_mv) / sigma_mv + shift
    lo = (v_reset_mv - mu_mv) / sigma_mv + shift
    if hi > _NO_RATE:
        return 0.0
    return 1.0 / (t_ref_s + tau_m_s * math.sqrt(math.pi) * _erfcx_neg_integral(lo, hi))


@dataclass(frozen=True)
class Input:
    """A bundle of independent Poisson inputs onto one cell."""

    count: float  # number of sources
    weight: float  # conductance jump per spike, g_leak
    rate_hz: float  # rate of each source
    excitatory: bool


@dataclass(frozen=True)
class Membrane:
    """Diffusion approximation of the free membrane potential of a conductance-based LIF cell."""

    mu_mv: float  # mean free potential
    sd_mv: float  # standard deviation of the free potential
    tau_eff_s: float  # effective time constant tau_m / (1 + mean conductances)
    tau_syn_s: float  # variance-weighted synaptic time constant
    sd_in_mv: float  # s.d. of the filtered input (the potential it would impose without membrane filtering)


def membrane(cfg: dict, inputs: list[Input]) -> Membrane:
    """Mean, s.d. and effective time constant of the free potential under Poisson ``inputs``.

    Mean conductances g_k = sum count * w * rate * tau_k set g_tot = 1 + g_e + g_i,
    tau_eff = tau_m / g_tot and mu = (E_L + g_e E_exc + g_i E_inh) / g_tot. Around mu each input
    acts as a current ``w (E_k - mu) / g_tot``; an exponentially filtered shot noise passed
    through the membrane filter has variance (Campbell's theorem)
    ``count rate (w (E_k - mu)/g_tot)^2 tau_k^2 / (2 (tau_k + tau_eff))``.
    """
    net = cfg["network"]
    tau_m = net["tau_m_ms"] * 1e-3
    taus = {True: net["tau_exc_ms"] * 1e-3, False: net["tau_inh_ms"] * 1e-3}
    revs = {True: net["e_exc_mv"], False: net["e_inh_mv"]}
    g = {True: 0.0, False: 0.0}
    for i in inputs:
        g[i.excitatory] += i.count * i.weight * i.rate_hz * taus[i.excitatory]
    g_tot = 1.0 + g[True] + g[False]
    tau_eff = tau_m / g_tot
    mu = (net["e_leak_mv"] + g[True] * revs[True] + g[False] * revs[False]) / g_tot
    var, var_tau, var_in = 0.0, 0.0, 0.0
    for i in inputs:
        tau_k = taus[i.excitatory]
        current = i.count * i.rate_hz * (i.weight * (revs[i.excitatory] - mu) / g_tot) ** 2 * tau_k / 2.0
        v = current * tau_k / (tau_k + tau_eff)
        var += v
        var_tau += v * tau_k
        var_in += current
    tau_syn = var_tau / var if var > 0 else 0.0
    return Membrane(mu, math.sqrt(var), tau_eff, tau_syn, math.sqrt(var_in))


_Z = np.linspace(-8.0, 8.0, 1601)
_Z_WEIGHTS = np.exp(-0.5 * _Z**2) / np.exp(-0.5 * _Z**2).sum()


def adiabatic_rate(mu_mv: float, sd_in_mv: float, tau_m_s: float, t_ref_s: float, v_th_mv: float,
                   v_reset_mv: float) -> float:
    """Rate (Hz) for slow Gaussian input: the noise-free rate averaged over the input distribution.

    Long-synaptic-time-constant (adiabatic) limit of colored-noise LIF theory (Moreno-Bote &
    Parga 2004, Phys Rev Lett 92:028102 [memory]): the input changes slowly compared with the
    membrane, so the cell fires at ``lif_rate_noise_free(mu + x)`` with x ~ N(0, sd_in^2), where
    sd_in is the s.d. of the filtered input (the steady-state potential it would impose).
    """
    mu = mu_mv + sd_in_mv * _Z
    above = mu > v_th_mv
    rates = np.zeros_like(mu)
    ratio = (mu[above] - v_reset_mv) / (mu[above] - v_th_mv)
    rates[above] = 1.0 / (t_ref_s + tau_m_s * np.log(ratio))
    return float(np.dot(_Z_WEIGHTS, rates))


TRANSFER_METHODS = ("adiabatic", "siegert", "siegert_fb")


def cell_rate(cfg: dict, inputs: list[Input], excitatory: bool, method: str = "adiabatic") -> float:
    """Firing rate (Hz) of an E (``excitatory``) or I cell under Poisson ``inputs``.

    ``method``:

    - ``"adiabatic"`` (default): :func:`adiabatic_rate` with the s.d. of the filtered input
      (``Membrane.sd_in_mv``). In the high-conductance states of this model
      tau_syn/tau_eff is 0.6-1.5, far from the white-noise limit; against a direct simulation
      of single cells (independent Poisson inputs, dt 0.1 ms) this is within about 25 %, where
      the Siegert forms err by factors of 2-3.
    - ``"siegert"``: Siegert formula at the free-membrane mean and s.d. (sigma = sqrt(2) sd,
      since white noise of intensity sigma gives variance sigma^2/2); overestimates here.
    - ``"siegert_fb"``: white-noise-equivalent sigma (sd inflated by
      sqrt((tau_syn + tau_eff)/tau_eff)) with the Fourcaud-Brunel boundary shift; underestimates.
    """
    net = cfg["network"]
    m = membrane(cfg, inputs)
    t_ref = (net["refractory_exc_ms"] if excitatory else net["refractory_inh_ms"]) * 1e-3
    v_th, v_r = net["v_threshold_mv"], net["v_reset_mv"]
    if method == "adiabatic":
        return adiabatic_rate(m.mu_mv, m.sd_in_mv, m.tau_eff_s, t_ref, v_th, v_r)
    sigma = math.sqrt(2.0) * m.sd_mv
    if method == "siegert":
        return siegert_rate(m.mu_mv, sigma, m.tau_eff_s, t_ref, v_th, v_r)
    if method == "siegert_fb":
        sigma *= math.sqrt((m.tau_syn_s + m.tau_eff_s) / m.tau_eff_s)
        return siegert_rate(m.mu_mv, sigma, m.tau_eff_s, t_ref, v_th, v_r, m.tau_syn_s)
    raise ValueError(f"unknown transfer method {method!r}; use one of {TRANSFER_METHODS}")
