"""Final weights of NEST plastic synapses driven by given spike trains: run as a script in its own process.

``python tests/nest_synapses.py < protocols.json`` prints one JSON list of final weights, one per synapse.
The input is ``{"delay_ms": d, "resolution_ms": h, "synapses": [...]}``; each synapse is
``{"model": NEST synapse model, "synapse": its parameters (weight, Wmax, ...), "target": parameters of
the target neuron (tau_minus, ...), "pre_ms": [...], "post_ms": [...]}``, where ``pre_ms`` and
``post_ms`` are the times (ms, on the resolution grid) at which the *plasticity rule* sees each pre and
post spike. The script works out the generator times that put them there.

Timing in NEST (stdp_triplet_synapse.h, vogels_sprekeler_synapse.h, NEST 3.10 [source read]): every
delay of a plastic synapse counts as dendritic. When a pre spike emitted at t is delivered, the rule
takes it at t (its time stamp) and takes a post spike emitted at s at s + d; it works through the post
spikes with t_last < s + d <= t, then applies the pre spike's own update. So a pre spike the rule sees
at T needs the pre parrot to fire at T, its generator at T - d (generator -> parrot delay d), and a post
spike the rule sees at T needs the post parrot to fire at T - d, its generator at T - 2d. (Counted from
the generators: a pre spike generated at g reaches the target at g + 2d, one delay after it is seen;
a post spike generated at g is seen at g + 2d.) Each synapse has its own pre and post parrot neuron;
the plastic connection goes onto receptor 1 of the post parrot, which does not relay spikes arriving
there, so the post parrot fires only at its own generator's times.

NEST updates a weight only when a pre spike is delivered: post spikes after a synapse's last pre spike
do not count. Protocols that should count them end with a pre spike.

Kept in a process of its own: NEST and Brian2 then never share threads, signal handlers or output.
Exits with status NO_NEST, the import error on stderr, where NEST is installed but does not import.
"""

from __future__ import annotations

import json
import sys

NO_NEST = 3
"""Exit status when ``import nest`` fails."""


def _final_weights(spec: dict) -> list[float]:
    import nest

    nest.ResetKernel()
    nest.verbosity = nest.VerbosityLevel.ERROR
    nest.SetKernelStatus({"resolution": spec["resolution_ms"], "local_num_threads": 1})
    d, grid = spec["delay_ms"], spec["resolution_ms"]
    connections = []
    for syn in spec["synapses"]:
        pre = nest.Create("parrot_neuron")
        post = nest.Create("parrot_neuron", params=syn["target"])
        for parrot, times, shift in ((pre, syn["pre_ms"], d), (post, syn["post_ms"], 2 * d)):
            generated = [round((t - shift) / grid) * grid for t in times]
            gen = nest.Create("spike_generator", params={"spike_times": generated})
            nest.Connect(gen, parrot, syn_spec={"delay": d})
        nest.Connect(pre, post, syn_spec={"synapse_model": syn["model"], "receptor_type": 1, "delay": d,
                                          **syn["synapse"]})
        connections.append(nest.GetConnections(pre, post))
    end = max(max(s["pre_ms"] + s["post_ms"]) for s in spec["synapses"])
    nest.Simulate(end + 3 * d)
    return [float(c.get("weight")) for c in connections]


if __name__ == "__main__":
    try:
        import nest  # noqa: F401
    except ImportError as error:
        print(f"import nest failed: {error}", file=sys.stderr)
        sys.exit(NO_NEST)
    print(json.dumps(_final_weights(json.load(sys.stdin))))
