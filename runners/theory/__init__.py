"""The theory under the prescreen: rate-form plasticity drift, LIF transfer functions, mean-field fixed points,
protocol-long weight dynamics, and the prescreen's verdict (a surrogate fitted to simulations on these quantities).

Pure numpy/scipy (no Brian2). Everything reads a point's nested config (``capsweep.registry``).

Units: rates in Hz, voltages in mV, times in seconds unless a name says otherwise, weights and
conductances in units of the leak conductance ``g_leak`` (dimensionless), plasticity drift in
g_leak per second.

Model of one conductance-based LIF cell (the network of :mod:`capsweep.runners.model`)::

    tau_m dV/dt = (E_L - V) + g_e (E_exc - V) + g_i (E_inh - V)

where each Poisson input of weight ``w`` makes its conductance jump by ``w`` and decay with
``tau_exc`` or ``tau_inh``. The diffusion approximation replaces the conductances by their
means (which set an effective time constant and mean potential) plus Gaussian fluctuations of
the free membrane potential; the rate then follows from the Siegert formula.

Populations in the mean field: cued members ``C`` and uncued members ``U`` of one assembly
(the "focal" assembly), members ``B`` of the other assemblies, non-members ``O`` and
inhibitory cells ``I``. Assemblies are treated as disjoint groups of ``assemblies.size``
cells (random overlap only shrinks the other assemblies' share); connections are random with
fixed in-degree, so a cell receives
``indegree_exc * (group size / n_exc)`` inputs from each excitatory group.

Modules: :mod:`.drift` (rate form of the plasticity rules), :mod:`.transfer` (LIF transfer
functions of one conductance-based cell), :mod:`.meanfield` (populations, fixed points, transfer
curves), :mod:`.dynamics` (weights and rates integrated over a point's protocol), :mod:`.link` (runaway
chance from theory quantities, the one part fitted to simulations), :mod:`.prediction` (the prescreen's verdict).
"""
