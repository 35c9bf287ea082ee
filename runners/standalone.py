"""The "standalone" engine: Brian2 C++ standalone with one compiled binary per network structure.

A *build* is the compiled project of one structure (``build_key``); every point of that structure
reruns the same binary with its own values, given as ``run_args``:

- neuron, synapse, rule, drive and stimulus constants: ``(shared, constant)`` variables
  (``capsweep.runners.model`` declares them when built with ``standalone=True``);
- initial weights (with prewired gains) and initial voltages: per-neuron / per-synapse arrays;
- the stimulus schedule and which cells each imprint and cue input drives: a per-run file
  (:data:`STIMULUS_FILE`) read by the C++ stimulus function, which kicks only the driven cells;
- protocol timing (steps), detection settings and the per-point RNG seed: shared variables of
  the one-cell ``watch`` group, read by a C++ function called at the start of every step.

Connectivity (the i/j arrays of the four E/I pathways) depends on ``wiring_seed``: the binary
loads it from its static-array files, so each run gets its own run directory whose
``static_arrays`` link the build's files and replace the wiring files.

The C++ ``watch`` function counts E spikes per trace bin from the spike monitor, copies E->E
``w`` into per-synapse snapshot variables at the snapshot steps, and sets Brian2's global stop
flag at the planned end or (``abort_on_runaway``) as soon as the runaway onset of
:func:`capsweep.runners.metrics.runaway_onset` is established (stop time = onset + hold). Its test uses a
threshold higher by a relative 1e-9, so it never stops before the offline definition, which
then gives the recorded onset from the spikes.

Build keys, the cache root and the compile lock are in :mod:`capsweep.runners.builds`; workers sharing the
cache root compile a structure once. A process keeps its current build's Brian2 objects alive and reruns it without code
generation; another key in the same process regenerates code (unchanged files are not
rewritten, so ``make`` recompiles only for a new structure).

What this engine cannot express (the point then falls back, see :mod:`capsweep.engines`) is
decided by :func:`capsweep.runners.builds.unsupported`.
"""

from __future__ import annotations

import contextlib
import dataclasses
import gc
import json
import shutil
import tempfile
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import brian2 as b2
import numpy as np

from ..engines import threads_of
from ..errors import CapsweepError
from . import protocol
from .builds import build_key, build_root, compiled_form, expected_compile_s, locked, record_compile_s
from .checkpoints import checkpoint_root, interval_steps, point_key, refuse_foreign, stamp
from .model import REF_SNAPSHOT_VARIABLE, SNAPSHOT_VARIABLE, Handles, build_network
from .notices import COMPILE_TOPIC, announce
from .scoring import Recording

MAX_DURATION_S = 1e7
"""Compiled run length (s); every run stops earlier through the watch function."""
_MARGIN = 1.0 + 1e-9


_WATCH_EQUATIONS = """
flag : integer (shared)
kicks : integer (shared)
stop_step : integer (shared)
end_step : integer (shared, constant)
settle_end : integer (shared, constant)
baseline_start : integer (shared, constant)
bin_steps : integer (shared, constant)
smooth_bins : integer (shared, constant)
hold_bins : integer (shared, constant)
abort : integer (shared, constant)
baseline_s : 1 (shared, constant)
bin_s : 1 (shared, constant)
factor : 1 (shared, constant)
floor_hz : 1 (shared, constant)
rng_seed : 1 (shared, constant)
checkpoint_every : integer (shared, constant)
resume : integer (shared, constant)
"""

_WATCH_CODE = """
#include <vector>
#include <cmath>
#include <algorithm>
static std::vector<double> _capsweep_rate;
static std::vector<char> _capsweep_keep;
static size_t _capsweep_last = 0;
static long _capsweep_run_start = -1;
static double _capsweep_threshold = -1.0;
static size_t _capsweep_base_count = 0;

static bool _capsweep_cue_in_bin = false;  // a cue was on during some step of the current bin

static bool _capsweep_bin_done(long b, size_t total) {
    using namespace brian;
    const double rate = (double)(total - _capsweep_last) / (N_EXC * W(bin_s));
    _capsweep_last = total;
    _capsweep_rate.push_back(rate);
    _capsweep_keep.push_back(!_capsweep_cue_in_bin);
    if (_capsweep_threshold < 0) return false;
    double sum = 0.0; long kept = 0;
    for (long c = std::max(0L, b - W(smooth_bins) + 1); c <= b; c++)
        if (_capsweep_keep[c]) { sum += _capsweep_rate[c]; kept++; }
    const bool valid = _capsweep_keep[b] && kept > 0;
    const bool low = valid && sum / kept < _capsweep_threshold * MARGIN;
    if (low) { _capsweep_run_start = -1; return false; }
    if (valid && _capsweep_run_start < 0 && (b + 1) * W(bin_steps) >= W(settle_end)) _capsweep_run_start = b;
    return _capsweep_run_start >= 0 && b - _capsweep_run_start >= W(hold_bins);
}

CHECKPOINTS

int capsweep_watch(int64_t step) {
    using namespace brian;
    if (step == 0 && W(resume)) step = _capsweep_restore();
    else if (W(checkpoint_every) > 0 && step > 0 && step % W(checkpoint_every) == 0 && step < W(end_step))
        _capsweep_save(step);
    SNAPSHOTS
    const size_t total = SPIKES.size();
    if (step == W(baseline_start)) _capsweep_base_count = total;
    if (step == W(settle_end)) {
        const double base = W(baseline_s) > 0 ? (total - _capsweep_base_count) / (N_EXC * W(baseline_s)) : NAN;
        _capsweep_threshold = std::isfinite(base) ? std::max(W(factor) * base, W(floor_hz)) : W(floor_hz);
    }
    bool runaway = false;
    if (step > 0 && step % W(bin_steps) == 0) {
        runaway = _capsweep_bin_done(step / W(bin_steps) - 1, total);
        _capsweep_cue_in_bin = false;
    }
    if (_capsweep_cue_on(step)) _capsweep_cue_in_bin = true;
    if (step >= W(end_step) || (runaway && W(abort))) {
        W(stop_step) = step;
        Network::_globally_stopped = true;
        return 1;
    }
    return 0;
}
"""


_CHECKPOINT_HEADERS = ["<cstdio>", "<cstdlib>", "<cstring>", "<fstream>", "<iostream>", "<random>", "<sstream>",
                       "<string>", "<utility>", "<unistd.h>"]
"""Headers of the checkpoint code, included at the top of its file (support code sits in an anonymous namespace)."""
_CHECKPOINT_CODE = r"""
// Private members, reached through explicit template instantiation (where access checks do not apply,
// C++ [temp.explicit]): each generator's engine state, and how the network picks the clocks due at a step.
template <typename Tag, typename Tag::type Member> struct _capsweep_reach {
    friend typename Tag::type _capsweep_member(Tag) { return Member; }
};
#define CAPSWEEP_TAG(NAME, TYPE) struct NAME { using type = TYPE; friend type _capsweep_member(NAME); }
CAPSWEEP_TAG(_capsweep_engine, std::mt19937 brian::RandomGenerator::*);
CAPSWEEP_TAG(_capsweep_gauss, double brian::RandomGenerator::*);
CAPSWEEP_TAG(_capsweep_has_gauss, bool brian::RandomGenerator::*);
CAPSWEEP_TAG(_capsweep_due, Clock* (Network::*)());
template struct _capsweep_reach<_capsweep_engine, &brian::RandomGenerator::gen>;
template struct _capsweep_reach<_capsweep_gauss, &brian::RandomGenerator::stored_gauss>;
template struct _capsweep_reach<_capsweep_has_gauss, &brian::RandomGenerator::has_stored_gauss>;
template struct _capsweep_reach<_capsweep_due, &Network::next_clocks>;

// One pass over the state, writing it to or reading it from a file: the same calls in both directions.
struct _capsweep_io {
    FILE* file;
    bool saving;
    bool ok;
    void bytes(void* data, size_t n) {
        if (!ok || n == 0) return;
        ok = (saving ? std::fwrite(data, 1, n, file) : std::fread(data, 1, n, file)) == n;
    }
    template <typename T> void value(T& v) { bytes(&v, sizeof(T)); }
    template <typename T> void fixed(T* data, uint64_t n) {  // an array of fixed length: the lengths must agree
        uint64_t stored = n;
        value(stored);
        ok = ok && stored == n;
        bytes(data, n * sizeof(T));
    }
    template <typename T> void growing(std::vector<T>& v) {  // a dynamic array: takes the stored length
        uint64_t n = v.size();
        value(n);
        if (!saving && ok) v.resize(n);
        bytes(v.data(), n * sizeof(T));
    }
    void text(std::string& s) {
        uint64_t n = s.size();
        value(n);
        ok = ok && n < (1u << 24);
        if (!saving && ok) s.resize(n);
        if (n > 0) bytes(&s[0], n);
    }
    void queue(CSpikeQueue* q) {  // spikes in flight: Brian2's own store/restore form of a queue
        std::pair<int, std::vector<std::vector<int32_t> > > state = q->_full_state();
        value(state.first);
        uint64_t slots = state.second.size();
        value(slots);
        if (!saving && ok) state.second.assign(slots, std::vector<int32_t>());
        for (size_t s = 0; ok && s < state.second.size(); s++) growing(state.second[s]);
        if (!saving && ok) q->_restore_from_full_state(state);
    }
    void generator(brian::RandomGenerator& g) {
        std::string engine;
        if (saving) {
            std::ostringstream out;
            out << g.*_capsweep_member(_capsweep_engine());
            engine = out.str();
        }
        text(engine);
        if (!saving && ok) {
            std::istringstream in(engine);
            in >> g.*_capsweep_member(_capsweep_engine());
            ok = !in.fail();
        }
        value(g.*_capsweep_member(_capsweep_gauss()));
        value(g.*_capsweep_member(_capsweep_has_gauss()));
    }
};

// Everything that evolves: state arrays (constants are the run's settings), spike queues, generators, the watch.
static void _capsweep_state(_capsweep_io& io) {
    using namespace brian;
    STATE
    uint64_t generators = _random_generators.size();
    io.value(generators);
    io.ok = io.ok && generators == _random_generators.size();
    for (size_t g = 0; io.ok && g < _random_generators.size(); g++) io.generator(_random_generators[g]);
    io.growing(_capsweep_rate);
    io.growing(_capsweep_keep);
    io.value(_capsweep_last);
    io.value(_capsweep_run_start);
    io.value(_capsweep_threshold);
    io.value(_capsweep_base_count);
    io.value(_capsweep_cue_in_bin);
}

static char _capsweep_head[9] = "CAPSWCK1", _capsweep_tail[9] = "CAPSWEND";
static std::string _capsweep_ck_path, _capsweep_ck_stamp;

static void _capsweep_ck_fail(const std::string& what) {
    std::cout << "capsweep: " << what << std::endl;
    std::exit(3);
}

static void _capsweep_ck_settings() {  // the checkpoint's path and the writer's stamp, from the run directory
    if (!_capsweep_ck_path.empty()) return;
    std::ifstream in("SETTINGS_FILE");
    std::getline(in, _capsweep_ck_path);
    std::getline(in, _capsweep_ck_stamp);
    if (_capsweep_ck_path.empty()) _capsweep_ck_fail("no checkpoint path in SETTINGS_FILE");
}

// The state at the start of `step` (nothing of the step has run: the watch is its first object), written
// to a file of this process that replaces the checkpoint in one rename.
static void _capsweep_save(int64_t step) {
    _capsweep_ck_settings();
    std::ostringstream partial;
    partial << _capsweep_ck_path << ".partial." << getpid();
    FILE* file = std::fopen(partial.str().c_str(), "wb");
    _capsweep_io io = {file, true, file != NULL};
    io.bytes(_capsweep_head, 8);
    io.text(_capsweep_ck_stamp);
    io.value(step);
    _capsweep_state(io);
    io.bytes(_capsweep_tail, 8);
    bool ok = io.ok && std::fflush(file) == 0 && fsync(fileno(file)) == 0;
    if (file != NULL) ok = std::fclose(file) == 0 && ok;
    if (!ok || std::rename(partial.str().c_str(), _capsweep_ck_path.c_str()) != 0) {
        std::remove(partial.str().c_str());
        _capsweep_ck_fail("could not write the checkpoint " + _capsweep_ck_path);
    }
}

// Called by the watch at step 0, before any other object ran: puts the checkpointed state in place and
// lets the network pick the clocks due at the restored step; returns that step.
static int64_t _capsweep_restore() {
    _capsweep_ck_settings();
    FILE* file = std::fopen(_capsweep_ck_path.c_str(), "rb");
    _capsweep_io io = {file, false, file != NULL};
    char head[8] = {0}, tail[8] = {0};
    std::string stamp;
    int64_t step = -1;
    io.bytes(head, 8);
    io.text(stamp);
    io.value(step);
    io.ok = io.ok && std::memcmp(head, _capsweep_head, 8) == 0 && stamp == _capsweep_ck_stamp;
    _capsweep_state(io);
    io.bytes(tail, 8);
    if (file != NULL) std::fclose(file);
    if (!io.ok || std::memcmp(tail, _capsweep_tail, 8) != 0)
        _capsweep_ck_fail("the checkpoint " + _capsweep_ck_path + " is damaged or not this build's");
    (brian::NETWORK.*_capsweep_member(_capsweep_due()))();
    return step;
}
"""
CHECKPOINT_SETTINGS_FILE = "capsweep_checkpoint.txt"
"""Per-run file of the checkpoint code, in the run directory: the checkpoint's path, then the writer's stamp."""
_HEAD, _TAIL = b"CAPSWCK1", b"CAPSWEND"


_STIMULUS_CODE = """
#include <algorithm>
#include <fstream>
#include <vector>
#include <cstdint>
static bool _capsweep_stim_loaded = false;
static int64_t _capsweep_stim_head[STIM_HEADER];
static std::vector<int64_t> _capsweep_stim_starts[2], _capsweep_stim_stops[2], _capsweep_stim_which[2];
static std::vector<std::vector<int32_t>> _capsweep_stim_cells[2];  // per kind and assembly: driven cells

static void _capsweep_stim_load() {
    std::ifstream file("STIM_FILE", std::ios::binary);
    file.read((char*)_capsweep_stim_head, sizeof(_capsweep_stim_head));
    const int64_t n = _capsweep_stim_head[0], count = _capsweep_stim_head[1], windows = _capsweep_stim_head[2];
    for (int64_t i = 0; i < windows; i++) {  // (kind, assembly, start, stop), in time order within a kind
        int64_t w[4];
        file.read((char*)w, sizeof(w));
        _capsweep_stim_which[w[0]].push_back(w[1]);
        _capsweep_stim_starts[w[0]].push_back(w[2]);
        _capsweep_stim_stops[w[0]].push_back(w[3]);
    }
    std::vector<char> row(n);
    for (int kind = 0; kind < 2; kind++) {
        _capsweep_stim_cells[kind].assign(count, std::vector<int32_t>());
        for (int64_t k = 0; k < count; k++) {
            file.read(row.data(), n);
            for (int32_t cell = 0; cell < n; cell++)
                if (row[cell]) _capsweep_stim_cells[kind][k].push_back(cell);
        }
    }
    _capsweep_stim_loaded = true;
}

// Assembly driven at this step by the imprint (kind 0) or cue (kind 1) input, or -1: the last window of
// that kind starting at or before the step, if the step lies before its stop.
static int64_t _capsweep_stim_assembly(int64_t step, int kind) {
    if (!_capsweep_stim_loaded) _capsweep_stim_load();
    const std::vector<int64_t>& starts = _capsweep_stim_starts[kind];
    const auto after = std::upper_bound(starts.begin(), starts.end(), step);
    if (after == starts.begin()) return -1;
    const size_t i = (after - starts.begin()) - 1;
    return step < _capsweep_stim_stops[kind][i] ? _capsweep_stim_which[kind][i] : -1;
}

static bool _capsweep_cue_on(int64_t step) { return _capsweep_stim_assembly(step, 1) >= 0; }

// Kicks of this step: each cell of the assembly that the imprint (cue) input drives now receives
// imprint_weight (cue_weight) with probability imprint_rate * dt (cue_rate * dt). Returns the kicks given.
int32_t STIM_NAME(int64_t step) {
    using namespace brian;
    const double dt = DT;
    const double p[2] = {IMPRINT_RATE * dt, CUE_RATE * dt}, w[2] = {IMPRINT_WEIGHT, CUE_WEIGHT};
    int32_t kicks = 0;
    for (int kind = 0; kind < 2; kind++) {
        const int64_t k = _capsweep_stim_assembly(step, kind);
        if (k < 0) continue;
        for (const int32_t cell : _capsweep_stim_cells[kind][k])
            if (_random_generators[0].rand() < p[kind]) { G_E[cell] += w[kind]; kicks++; }
    }
    return kicks;
}
"""
STIMULUS_FILE = "capsweep_stimulus.bin"
"""Per-run file of the stimulus function, in the run directory (the binary's working directory)."""


STIMULUS_FUNCTION = "capsweep_stimulus"
"""Name of the C++ function ``(step) -> kicks`` that applies the imprint and cue input of a step."""


def _stimulus_function(exc: b2.NeuronGroup) -> b2.Function:
    """The C++ stimulus function :data:`STIMULUS_FUNCTION`, called once per step (``synapses`` slot).

    It reads :data:`STIMULUS_FILE` on its first call (see :func:`_stimulus_file` for the layout),
    finds the imprint and cue windows open at the step in the schedule's window table (a binary search), and
    gives each cell they drive an input of ``imprint_weight`` (``cue_weight``) with probability
    ``imprint_rate * dt`` (``cue_rate * dt``), as one Poisson source per cell and channel does in the
    runtime engines. Only driven cells are visited (a loop over all E cells per step cost a
    quarter of a point's time at N_E = 4000). Assemblies may share cells: a cell follows every
    assembly it belongs to, and membership changes per run without recompiling.
    """
    device = b2.get_device()

    def array(group: Any, name: str) -> str:
        return f"{device.get_array_name(group.variables[name])}[0]"

    code = (_STIMULUS_CODE.replace("STIM_HEADER", str(len(_STIMULUS_HEADER))).replace("STIM_FILE", STIMULUS_FILE)
            .replace("STIM_NAME", STIMULUS_FUNCTION).replace("DT", array(b2.defaultclock, "dt"))
            .replace("G_E", device.get_array_name(exc.variables["g_e"])))
    for name in ("imprint_rate", "cue_rate", "imprint_weight", "cue_weight"):
        code = code.replace(name.upper(), array(exc, name))
    fn = b2.Function(lambda step: 0, arg_units=[1], return_unit=1, arg_types=["integer"], return_type="integer",
                     stateless=False)
    fn.implementations.add_implementation("cpp", code, name=STIMULUS_FUNCTION,
                                          compiler_kwds={"headers": ['"objects.h"']})
    return fn


_STIMULUS_HEADER = ("n_exc", "count", "windows")
"""Leading int64 values of the stimulus file, in this order."""


def _stimulus_file(path: Path, handles: Handles, learned: bool) -> None:
    """Write the stimulus function's input: header, input windows, imprint members, cued members.

    Layout (little-endian): int64 header (:data:`_STIMULUS_HEADER`); int64 (kind, assembly, first step, stop
    step) of every imprint (kind 0; none unless learned) and cue (kind 1) window of the schedule, in time order
    within a kind; uint8 membership matrices (count x n_exc) of the imprint input (members) and of the cue input
    (cued members).
    """
    sched, members, cued = handles.schedule, handles.memberships, handles.cued
    count, n_exc = members.shape
    windows = [(0, *w) for w in (sched.imprint_windows if learned else ())] + [(1, *w) for w in sched.all_cues]
    with open(path, "wb") as out:
        np.array([n_exc, count, len(windows)], dtype="<i8").tofile(out)
        np.array(windows, dtype="<i8").reshape(-1, 4).tofile(out)
        np.asarray(members, dtype=np.uint8).tofile(out)
        np.asarray(cued, dtype=np.uint8).tofile(out)


@dataclass
class _Build:
    """A compiled structure and the live Brian2 objects that address its variables."""

    key: str
    directory: Path
    network: b2.Network
    handles: Handles
    watch: b2.NeuronGroup
    wiring_files: dict[str, tuple[str, str]]  # synapses name -> static-array files of (i, j)


_CURRENT: dict[str, _Build] = {}


def _watch_function(handles: Handles, watch: b2.NeuronGroup, snapshots: b2.NeuronGroup,
                    stimulus: b2.Function, network: b2.Network) -> b2.Function:
    """The C++ ``capsweep_watch(step)`` function, with the array names of this build filled in.

    It asks the ``stimulus`` function's code whether a cue is on, to leave cue periods out of
    the runaway test as :func:`capsweep.runners.protocol.cue_bins` does offline, and writes and
    restores checkpoints (:data:`_CHECKPOINT_CODE`) of the state of ``network`` (see :func:`_state_code`).
    """
    device = b2.get_device()

    def array(group: Any, name: str, dynamic: bool = False) -> str:
        return device.get_array_name(group.variables[name], access_data=not dynamic)

    steps = array(snapshots, "step")
    copied = [("w", SNAPSHOT_VARIABLE.format(s), s) for s in range(len(snapshots))]
    if REF_SNAPSHOT_VARIABLE.format(0) in handles.s_ee.variables:
        copied += [("w_ref", REF_SNAPSHOT_VARIABLE.format(s), s + 1) for s in range(len(snapshots) - 1)]
    copies = "\n    ".join(
        f"if (step == {steps}[{at}]) std::copy({array(handles.s_ee, source, dynamic=True)}.begin(), "
        f"{array(handles.s_ee, source, dynamic=True)}.end(), {array(handles.s_ee, copy, dynamic=True)}.begin());"
        for source, copy, at in copied)
    checkpoints = (_CHECKPOINT_CODE.replace("STATE", _state_code(network)).replace("NETWORK", network.name)
                   .replace("SETTINGS_FILE", CHECKPOINT_SETTINGS_FILE))
    code = (_WATCH_CODE.replace("CHECKPOINTS", checkpoints).replace("SNAPSHOTS", copies)
            .replace("SPIKES", array(handles.mon_exc, "t", dynamic=True))
            .replace("N_EXC", f"{len(handles.exc)}.0").replace("MARGIN", repr(_MARGIN)))
    for name in watch.equations.names:
        code = code.replace(f"W({name})", f"{array(watch, name)}[0]")
    fn = b2.Function(lambda step: 0, arg_units=[1], return_unit=1, arg_types=["integer"], return_type="integer")
    fn.implementations.add_implementation("cpp", code, name="capsweep_watch",
                                          dependencies={STIMULUS_FUNCTION: stimulus},
                                          compiler_kwds={"headers": ['"network.h"', *_CHECKPOINT_HEADERS]})
    return fn


def _state_arrays() -> tuple[list[str], list[str]]:
    """Names of the device's fixed-length and dynamic arrays that hold state, sorted (constants are settings)."""
    device = b2.get_device()
    if device.dynamic_arrays_2d:
        raise RuntimeError("the standalone checkpoint code has no form for 2-d dynamic arrays (state monitors)")
    fixed = sorted(name for var, name in device.arrays.items() if var not in device.dynamic_arrays and not var.constant)
    dynamic = sorted(name for var, name in device.dynamic_arrays.items() if not var.constant)
    return fixed, dynamic


def _state_code(network: b2.Network) -> str:
    """The C++ calls of ``_capsweep_state``: every state array (:func:`_state_arrays`), then every spike queue."""
    fixed, dynamic = _state_arrays()
    lines = [f"io.fixed({name}, _num_{name});" for name in fixed] + [f"io.growing({name});" for name in dynamic]
    pathways = sorted(p.name for obj in network.objects if isinstance(obj, b2.Synapses) for p in obj._pathways)
    lines += [f"for (int q = 0; q < {name}._nb_threads; q++) io.queue({name}.queue[q]);" for name in pathways]
    return "\n    ".join(lines)


def _watch_values(cfg: dict, seed: int, sched: protocol.Schedule) -> dict[str, Any]:
    det, bin_s = cfg["detection"], cfg["detection"]["trace_bin_ms"] * 1e-3
    return {
        "end_step": sched.end, "settle_end": sched.settle_end, "baseline_start": sched.baseline_start,
        "bin_steps": int(round(bin_s / sched.dt_s)), "smooth_bins": max(int(round(det["smoothing_s"] / bin_s)), 1),
        "hold_bins": int(round(det["runaway_hold_s"] / bin_s)), "abort": int(cfg["execution"]["abort_on_runaway"]),
        "baseline_s": sched.seconds(sched.settle_end - sched.baseline_start), "bin_s": bin_s,
        "factor": det["runaway_factor"],
        "floor_hz": det["runaway_floor_hz"], "rng_seed": float(seed % 2**53),
        "stop_step": -1,  # written by the watch; passing it makes Brian2 read it back from the run
    }


def _use_standalone(directory: Path, fresh: bool) -> Any:
    """Make C++ standalone the active device; ``fresh`` forgets the objects of any earlier build."""
    b2.set_device("cpp_standalone", build_on_run=False, directory=str(directory))
    device = b2.get_device()
    if fresh:
        device.reinit()
        device.activate(build_on_run=False, directory=str(directory))
        _CURRENT.clear()
        # Brian2 names code objects uniquely among the instances alive: objects of an earlier build
        # still waiting for the cycle collector would make this build's names (and so its code, and
        # the need to recompile it) depend on what the process ran before.
        gc.collect()
    return device


def _compile(cfg: dict, seed: int, wiring_seed: int | None, key: str) -> _Build:
    """Generate (and, if the code changed, compile) the build of ``key``; keep its objects live."""
    directory = build_root() / key
    device = _use_standalone(directory, fresh=True)
    threads = threads_of(cfg)
    b2.prefs.devices.cpp_standalone.openmp_threads = threads if threads > 1 else 0  # 0: no OpenMP at all
    network, ns, handles = build_network(cfg, seed, wiring_seed, standalone=True)
    watch = b2.NeuronGroup(1, _WATCH_EQUATIONS, name="watch")
    snapshots = b2.NeuronGroup(len(handles.schedule.snapshots) + 1, "step : integer (constant)", name="snapshots")
    stimulus = _stimulus_function(handles.exc)
    # the watch is each step's first object: a checkpoint holds the state before anything of its step ran
    watch.run_regularly("flag = capsweep_watch(timestep(t, dt))", when="start", order=-1, name="watch_tick")
    watch.run_regularly(f"kicks = {STIMULUS_FUNCTION}(timestep(t, dt))", when="synapses", order=1,
                        name="stimulus_tick")
    network.add(watch, snapshots)
    ns = {**ns, "capsweep_watch": _watch_function(handles, watch, snapshots, stimulus, network),
          STIMULUS_FUNCTION: stimulus}
    state = _state_arrays()
    device.apply_run_args()
    device.insert_code("main", "for (size_t _g = 0; _g < brian::_random_generators.size(); _g++) "
                               "brian::_random_generators[_g].seed((unsigned long) "
                               f"{device.get_array_name(watch.variables['rng_seed'])}[0] + _g);")
    network.run(MAX_DURATION_S * b2.second, namespace=ns)
    if _state_arrays() != state:  # made by code generation, after the checkpoint code was written
        raise RuntimeError("the standalone checkpoint code misses state arrays made during code generation")
    with _first_compile_announced(key, directory), locked(build_root() / f"{key}.lock"):
        device.build(directory=str(directory), compile=True, run=False, with_output=False)
    wiring = {}
    for name in handles.wiring:
        wiring[name] = tuple(next(n for n in device.static_arrays if n.startswith(f"_static_array__array_{name}_{end}"))
                             for end in ("sources", "targets"))
    build = _Build(key, directory, network, handles, watch, wiring)
    _CURRENT[key] = build
    return build


@contextlib.contextmanager
def _first_compile_announced(key: str, directory: Path) -> Iterator[None]:
    """Announce a build's first compile (no binary yet) to the sweep's client while it lasts; keep its duration."""
    if (directory / "main").exists():
        yield
        return
    announce(COMPILE_TOPIC, {"build": key, "expected_s": expected_compile_s(), "finished": False})
    started = time.perf_counter()
    try:
        yield
        record_compile_s(key, time.perf_counter() - started)
    finally:
        announce(COMPILE_TOPIC, {"build": key, "expected_s": 0.0, "finished": True})


def _point_values(cfg: dict, seed: int, wiring_seed: int | None) -> Handles:
    """Membership, wiring and per-run settings of a point, from a throw-away runtime build.

    ``build_network`` is the one place that turns a config into values; building the network
    once more on the runtime device (numpy target; nothing compiled, nothing simulated) gives
    them, addressed by object name.
    """
    b2.BrianLogger.suppress_name("unused_brian_object")  # these objects are never meant to run
    b2.set_device("runtime")
    b2.prefs.codegen.target = "numpy"
    return build_network(cfg, seed, wiring_seed, standalone=True)[2]


@contextlib.contextmanager
def _run_directory(build: _Build, point: Handles, learned: bool) -> Iterator[Path]:
    """A fresh directory to run the build's binary in, with this point's wiring and stimulus; removed afterwards."""
    run_dir = Path(tempfile.mkdtemp(prefix="run-", dir=build.directory))
    try:
        arrays = run_dir / "static_arrays"
        arrays.mkdir()
        replaced = {file: values for name, files in build.wiring_files.items()
                    for file, values in zip(files, point.wiring[name])}
        for source in (build.directory / "static_arrays").iterdir():
            if source.name not in replaced and not source.name.endswith(".lock"):
                (arrays / source.name).symlink_to(source)
        for file, values in replaced.items():
            np.asarray(values, dtype=np.int32).tofile(arrays / file)
        _stimulus_file(run_dir / STIMULUS_FILE, point, learned)
        (run_dir / "main").symlink_to(build.directory / "main")
        yield run_dir
    finally:
        shutil.rmtree(run_dir, ignore_errors=True)


@dataclass(frozen=True)
class _Checkpoint:
    """A point's checkpoint file, written and read by the binary (:data:`_CHECKPOINT_CODE`).

    Layout (host byte order): ``CAPSWCK1``; the writer's stamp (uint64 length, JSON text of
    :func:`capsweep.runners.checkpoints.stamp` with the build key); the int64 step; the state; ``CAPSWEND``.
    """

    path: Path
    every: int  # steps between checkpoints (0: off)
    stamp: dict[str, str]

    @classmethod
    def of(cls, cfg: dict, seed: int, wiring_seed: int | None, key: str) -> _Checkpoint:
        return cls(checkpoint_root() / f"{point_key(cfg, seed, wiring_seed)}.bin", interval_steps(cfg), stamp(key))

    def resumes(self) -> bool:
        """True if the run resumes from the file; CapsweepError if another program or build wrote it."""
        if self.every <= 0 or not self.path.exists():
            return False
        refuse_foreign(self.path, read_checkpoint(self.path)[0], self.stamp)
        return True

    def prepare(self, run_dir: Path, resume: bool) -> dict[str, int]:
        """Write the run's checkpoint settings file; the watch's checkpoint values (run_args)."""
        if self.every > 0:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self._remove_partial()
        text = f"{self.path.resolve()}\n{json.dumps(self.stamp, sort_keys=True)}\n"
        (run_dir / CHECKPOINT_SETTINGS_FILE).write_text(text)
        return {"checkpoint_every": min(self.every, 2**31 - 1), "resume": int(resume)}

    def remove(self) -> None:
        """Delete the checkpoint (its point is complete) and any file a killed writer left half written."""
        self.path.unlink(missing_ok=True)
        self._remove_partial()

    def _remove_partial(self) -> None:
        for partial in self.path.parent.glob(f"{self.path.name}.partial.*"):
            partial.unlink(missing_ok=True)


def read_checkpoint(path: Path) -> tuple[Any, int]:
    """The writer's stamp and the step of the standalone checkpoint at ``path``; (None, -1) if it is not one."""
    with open(path, "rb") as handle:
        head = handle.read(8)
        length = np.frombuffer(handle.read(8).ljust(8, b"\0"), dtype=np.uint64)[0]
        text = handle.read(int(min(length, 1 << 24)))
        step = np.frombuffer(handle.read(8).ljust(8, b"\0"), dtype=np.int64)[0]
    try:
        found = json.loads(text) if head == _HEAD else None
    except ValueError:
        found = None
    return found, int(step) if found is not None else -1


def _binary_said(run_dir: Path) -> str | None:
    """The binary's own line of a failed run (``capsweep: ...`` on its output), if it wrote one."""
    output = run_dir / "results" / "stdout.txt"
    lines = output.read_text(errors="replace").splitlines() if output.exists() else []
    return next((line.removeprefix("capsweep: ") for line in reversed(lines) if line.startswith("capsweep: ")), None)


def simulate(cfg: dict, seed: int, wiring_seed: int | None = None) -> tuple[Handles, Recording]:
    """Run one point on the (cached or new) build of its structure; see the module docstring.

    Returns the point's handles (membership, schedule, sizes; its Brian2 objects are inert) and
    what the run recorded. With ``execution.checkpoint_interval_s`` > 0 the binary writes a
    checkpoint every interval and a rerun resumes from it (CapsweepError for a checkpoint of
    another program or build). Check :func:`capsweep.runners.builds.unsupported` first.
    """
    start = time.perf_counter()
    cfg = compiled_form(cfg)
    key = build_key(cfg)
    values = _point_values(cfg, seed, wiring_seed)
    checkpoint = _Checkpoint.of(cfg, seed, wiring_seed, key)
    resume = checkpoint.resumes()
    build = _CURRENT.get(key) or _compile(cfg, seed, wiring_seed, key)
    device = _use_standalone(build.directory, fresh=False)
    net, sched = build.network, values.schedule
    run_args = {getattr(net[group.name], name): value for group, name, value in values.settings}
    run_args.update({getattr(build.watch, name): value for name, value in _watch_values(cfg, seed, sched).items()})
    run_args[net["snapshots"].step] = np.array([sched.imprint_end, *sched.snapshots])
    project_dir = device.project_dir
    with _run_directory(build, values, cfg["assemblies"]["imprint"] == "learned") as run_dir:
        ck_values = checkpoint.prepare(run_dir, resume)
        run_args.update({getattr(build.watch, name): value for name, value in ck_values.items()})
        device.project_dir = str(run_dir)
        try:
            setup_s = time.perf_counter() - start
            _run_binary(device, run_dir, run_args)
            recording = dataclasses.replace(_read(build, sched), setup_s=setup_s)
        finally:
            device.project_dir = project_dir
    checkpoint.remove()
    (build.directory / "last_used").touch()
    return values, recording


def _run_binary(device: Any, run_dir: Path, run_args: dict) -> None:
    """Run the build's binary in ``run_dir``; a failure it explains itself becomes a one-line CapsweepError."""
    try:
        device.run(directory=str(run_dir), results_directory="results", with_output=False, run_args=run_args)
    except RuntimeError:
        said = _binary_said(run_dir)
        if said is None:
            raise
        raise CapsweepError(said) from None


def _read(build: _Build, sched: protocol.Schedule) -> Recording:
    """Spikes before the stop step, the stop time and the snapshots taken up to it."""
    h = build.handles
    stop = int(np.asarray(build.watch.stop_step[:]).ravel()[0])
    sim_time = sched.seconds(stop)
    limit = sim_time - 0.5 * sched.dt_s  # the stop step itself still runs: drop its spikes
    t_e, i_e, t_i = np.asarray(h.mon_exc.t_[:]), np.asarray(h.mon_exc.i[:]), np.asarray(h.mon_inh.t_[:])
    before_e = t_e < limit
    weights, snaps, ref_snaps = {}, [], []
    reference = REF_SNAPSHOT_VARIABLE.format(0) in h.s_ee.variables
    for s, (name, step) in enumerate([("imprint", sched.imprint_end)]
                                     + [(f"snap{i}", x) for i, x in enumerate(sched.snapshots)]):
        if step <= stop:
            weights[name] = np.array(getattr(h.s_ee, SNAPSHOT_VARIABLE.format(s))[:])
            if name.startswith("snap"):
                snaps.append(weights[name])
                if reference:
                    ref_snaps.append(np.array(getattr(h.s_ee, REF_SNAPSHOT_VARIABLE.format(s - 1))[:]))
    return Recording(t_e[before_e], i_e[before_e], t_i[t_i < limit], sim_time, weights, snaps, ref_snaps=ref_snaps)
