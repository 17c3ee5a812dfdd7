"""The monitor pass in a process of its own (``PHASEWARD_JUDGE_APART``).

One server process answers requests and runs the monitor passes in one interpreter: a fleet's
passes and its requests then take turns on one core. With this, the pass
(:func:`~phaseward.monitor.ingest.advance`: the rail's samples and live state in, its new
state and findings out) runs in a helper process, and the server's thread waits for it without
holding the interpreter, so requests are parsed and stored on one core while passes run on
another. The pass is a pure function: the same model, samples, state and tolerances give the
same state and findings in either process, so events and verdicts do not change.

Each pass sends the samples and the previous state (about 13 kB pickled for 12 phases); the
rail model is sent once and kept in the helper by a serial number. Should the helper die, the
pass runs in the server's process and the next pass starts a new helper.

The physics keeps what it derives from a thermal network (the step's propagator, the Riccati
solutions of the estimator and of the drift test) per network object, a few dozen networks
at most. In the server, rails of one design share one network (built once per set of values);
a pickled model arrives with a copy of its own, so the helper gives every model the network
an equal one brought before (:func:`shared_network`), or a fleet of one design would solve
the Riccati equation again on nearly every pass.
"""

from __future__ import annotations

import logging
import multiprocessing
import signal
import threading
import weakref
from collections import OrderedDict
from dataclasses import replace
from multiprocessing.connection import Connection
from multiprocessing.reduction import ForkingPickler
from typing import Any

from threadpoolctl import threadpool_limits

from phaseward.collector import quiet_collector
from phaseward.monitor.conditions import Passed
from phaseward.monitor.ingest import Tolerances, advance
from phaseward.monitor.rail_model import RailModel
from phaseward.monitor.telemetry import SampleBatch
from phaseward.physics.thermal import ThermalNetwork

_log = logging.getLogger(__name__)

_DONE, _FAILED, _MISSING = "done", "failed", "missing"  # the helper's answers
_LOST = "lost"  # no answer: the helper died


class JudgeApart:
    """A callable in place of :func:`advance` (``Tuning.monitor_pass``) that runs it in a helper
    process. Calls from several threads take turns (one helper, one pass at a time).
    ``kept_models``: rail models the helper keeps (set it to at least the fleet)."""

    def __init__(self, kept_models: int, blas_threads: int) -> None:
        self._kept = kept_models
        self._blas = blas_threads
        self._lock = threading.Lock()
        # id(model) -> (model, serial); the reference keeps the id from being reused
        self._serials: OrderedDict[int, tuple[RailModel, int]] = OrderedDict()
        self._issued = 0
        self._helper: tuple[multiprocessing.process.BaseProcess, Connection] | None = None

    def __call__(
        self,
        model: RailModel,
        batch: SampleBatch,
        previous: dict[str, Any],
        tolerances: Tolerances,
    ) -> Passed:
        with self._lock:
            try:
                kind, answer = self._ask(model, batch, previous, tolerances)
            except (OSError, EOFError):  # the helper is gone: this pass is judged here
                _log.exception("the judging process stopped; judging in the server process")
                self._stop()
                kind, answer = _LOST, None
        if kind == _LOST:
            return advance(model, batch, previous, tolerances)
        if kind == _FAILED:
            raise answer
        return answer  # type: ignore[no-any-return]

    def close(self) -> None:
        with self._lock:
            self._stop()

    def _ask(
        self, model: RailModel, batch: SampleBatch, previous: dict[str, Any], tol: Tolerances
    ) -> tuple[str, Any]:
        connection = self._connection()
        serial = self._serial(model)
        connection.send((serial, None, batch, previous, tol))
        kind, answer = connection.recv()
        if kind == _MISSING:  # new to the helper, or dropped from its cache: send it whole
            connection.send((serial, model, batch, previous, tol))
            kind, answer = connection.recv()
        return kind, answer

    def _serial(self, model: RailModel) -> int:
        kept = self._serials.get(id(model))
        if kept is None:
            self._issued += 1
            kept = self._serials[id(model)] = (model, self._issued)
            while len(self._serials) > self._kept:
                self._serials.popitem(last=False)
        self._serials.move_to_end(id(model))
        return kept[1]

    def _connection(self) -> Connection:
        if self._helper is None:
            context = multiprocessing.get_context("spawn")  # no copy of the server's threads
            ours, theirs = context.Pipe()
            process = context.Process(
                target=serve, args=(theirs, self._kept, self._blas), name="phaseward-judge",
                daemon=True,
            )  # fmt: skip
            try:
                process.start()
            except Exception as err:  # judged in the server meanwhile, as if the helper died
                raise OSError("the judging process did not start") from err
            finally:
                theirs.close()
            self._helper = (process, ours)
        return self._helper[1]

    def _stop(self) -> None:
        if self._helper is None:
            return
        process, connection = self._helper
        self._helper = None
        connection.close()  # the helper reads the end of its pipe and returns
        process.join(timeout=5.0)
        if process.is_alive():
            process.kill()
            process.join()


def serve(connection: Connection, kept_models: int, blas_threads: int) -> None:
    """The helper: judge what arrives until the server closes its end of the pipe."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # a Ctrl-C stops the server, which stops this
    threadpool_limits(limits=blas_threads, user_api="blas")
    quiet_collector()  # a fleet's models live here as long as in the server
    models: OrderedDict[int, RailModel] = OrderedDict()
    networks: Networks = weakref.WeakValueDictionary()
    while True:
        try:
            serial, model, batch, previous, tolerances = connection.recv()
        except EOFError:
            return
        if model is not None:
            models[serial] = shared_network(model, networks)
            while len(models) > kept_models:
                models.popitem(last=False)
        model = models.get(serial)
        if model is None:
            connection.send((_MISSING, None))
            continue
        models.move_to_end(serial)
        try:
            connection.send((_DONE, advance(model, batch, previous, tolerances)))
        except Exception as err:  # the pass's own failure, raised again in the server
            connection.send((_FAILED, _picklable(err)))


Networks = weakref.WeakValueDictionary[tuple[bytes, ...], ThermalNetwork]


def shared_network(model: RailModel, networks: Networks) -> RailModel:
    """``model`` with the network of equal values that a model kept before brought, if any
    (``networks``: by their arrays' bytes; a network goes once no kept model holds it)."""
    net = model.network
    key = (
        *(a.tobytes() for a in (net.conductance_w_per_k, net.capacitance_j_per_k,
                                net.ambient_conductance_w_per_k, net.junction_node)),
        net.board_node.to_bytes(8, "little"),
    )  # fmt: skip
    kept = networks.setdefault(key, net)
    return model if kept is net else replace(model, network=kept)


def _picklable(err: Exception) -> Exception:
    try:
        ForkingPickler.dumps(err)
    except Exception:
        return RuntimeError(f"the monitor pass failed in the judging process: {err!r}")
    return err
