"""pytest plugin for test racks: stream a rail's samples to phaseward during a test and fail
the test when the rail went overloaded or a chosen kind of event appeared meanwhile.

Configuration (the marker wins over the command line, the command line over the ini file):

* ``--phaseward-url URL`` / ini ``phaseward_url``: the service.
* ``--phaseward-rail ID`` / ini ``phaseward_rail``: the rail the rack's samples belong to
  (it must be defined on the service already).
* ``--phaseward-fail-on KIND`` (repeatable) / ini ``phaseward_fail_on`` (one kind a line):
  event kinds that fail any test using the fixture.
* ini ``phaseward_batch_size`` (default 100) and ``phaseward_max_delay_s`` (default 0.5).
* ``@pytest.mark.phaseward(fail_on=["phase.isolated"], rail="other-rail",
  fail_on_overload=True)``: per test; ``fail_on`` adds to the configured kinds.

A test that uses the ``phaseward_rail`` fixture gets a ``RailRecorder``; ``send()`` queues a
sample on a ``BatchingSender``. Right after the test body returns, the recorder flushes and
reads the rail's events newer than the newest one at setup: a ``rail.condition`` event whose
``details.to`` is ``"overloaded"``, or an event of a ``fail_on`` kind (not a clearing one,
``details.cleared``), fails the test (FAILED, not an error). Samples that other fixtures send
during their teardown are checked when the recorder is torn down (an ERROR at teardown). A
batch the service refused fails the test too: the check would be blind without it.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

import httpx
import pytest

from phaseward_client.batching import BatchingSender
from phaseward_client.client import Client
from phaseward_client.errors import PhasewardError, SendFailed
from phaseward_client.inputs import SampleLike
from phaseward_client.models import Event, RailStatus

OVERLOADED = "overloaded"
MARKER = "phaseward"
RECORDER = pytest.StashKey["RailRecorder"]()


def pytest_addoption(parser: pytest.Parser) -> None:
    group = parser.getgroup("phaseward", "stream test-rack samples to phaseward")
    group.addoption(
        "--phaseward-url",
        dest="phaseward_url",
        default=None,
        help="base URL of the phaseward service (ini: phaseward_url)",
    )
    group.addoption(
        "--phaseward-rail",
        dest="phaseward_rail",
        default=None,
        help="rail id the rack's samples belong to (ini: phaseward_rail)",
    )
    group.addoption(
        "--phaseward-fail-on",
        dest="phaseward_fail_on",
        action="append",
        default=None,
        metavar="KIND",
        help="event kind that fails a test, repeatable (ini: phaseward_fail_on)",
    )
    parser.addini("phaseward_url", "base URL of the phaseward service", default="")
    parser.addini("phaseward_rail", "rail id the rack's samples belong to", default="")
    parser.addini("phaseward_fail_on", "event kinds that fail a test", type="linelist", default=[])
    parser.addini("phaseward_batch_size", "samples per post", default="100")
    parser.addini(
        "phaseward_max_delay_s", "longest wait before a partial batch is posted", default="0.5"
    )


def pytest_configure(config: pytest.Config) -> None:
    config.addinivalue_line(
        "markers",
        "phaseward(fail_on=(), rail=None, fail_on_overload=True): event kinds that fail this "
        "test (added to the configured ones), the rail to stream to, and whether going "
        "overloaded fails it",
    )


@dataclass(frozen=True)
class Settings:
    url: str
    rail_id: str
    fail_on: frozenset[str]
    fail_on_overload: bool
    batch_size: int
    max_delay_s: float


def _settings(request: pytest.FixtureRequest) -> Settings:
    config = request.config
    marker = request.node.get_closest_marker(MARKER)
    kwargs: dict[str, Any] = dict(marker.kwargs) if marker is not None else {}
    unknown = set(kwargs) - {"fail_on", "rail", "fail_on_overload"}
    if marker is not None and (marker.args or unknown):
        raise pytest.UsageError(
            f"@pytest.mark.phaseward takes only fail_on=, rail=, fail_on_overload= "
            f"(got args {marker.args!r}, keywords {sorted(unknown)})"
        )
    url = config.getoption("phaseward_url") or str(config.getini("phaseward_url"))
    rail = (
        kwargs.get("rail")
        or config.getoption("phaseward_rail")
        or str(config.getini("phaseward_rail"))
    )
    if not url:
        pytest.fail(
            "phaseward_rail needs --phaseward-url or the ini option phaseward_url", pytrace=False
        )
    if not rail:
        pytest.fail(
            "phaseward_rail needs a rail: --phaseward-rail, the ini option "
            "phaseward_rail or @pytest.mark.phaseward(rail=...)",
            pytrace=False,
        )
    extra = kwargs.get("fail_on", ())
    if isinstance(extra, str) or not isinstance(extra, Sequence | set | frozenset):
        raise pytest.UsageError("@pytest.mark.phaseward(fail_on=...) takes a list of event kinds")
    configured: list[str] = list(config.getini("phaseward_fail_on"))
    configured += config.getoption("phaseward_fail_on") or []
    return Settings(
        url=str(url),
        rail_id=str(rail),
        fail_on=frozenset(configured) | frozenset(str(k) for k in extra),
        fail_on_overload=bool(kwargs.get("fail_on_overload", True)),
        batch_size=int(config.getini("phaseward_batch_size")),
        max_delay_s=float(config.getini("phaseward_max_delay_s")),
    )


def offending(events: Sequence[Event], fail_on: frozenset[str], overload: bool) -> list[Event]:
    """The events that fail a test: the rail going overloaded, or a raised ``fail_on`` kind."""
    bad = []
    for e in events:
        overloaded = e.kind == "rail.condition" and e.details.get("to") == OVERLOADED
        if (overload and overloaded) or (e.kind in fail_on and not e.cleared):
            bad.append(e)
    return bad


def _describe(e: Event) -> str:
    where = f" phase {e.phase}" if e.phase is not None else ""
    return f"#{e.id} {e.time} {e.severity} {e.kind}{where}: {e.message}"


@dataclass
class RailRecorder:
    """What a test gets from the ``phaseward_rail`` fixture."""

    client: Client
    settings: Settings
    sender: BatchingSender
    baseline_id: int
    checked_id: int
    seen: list[Event] = field(default_factory=list)

    @property
    def rail_id(self) -> str:
        return self.settings.rail_id

    def send(self, sample: SampleLike) -> int:
        """Queue a sample (a ``seq`` is assigned when it has none); returns its seq."""
        return self.sender.add(sample)

    def flush(self) -> None:
        """Post everything queued and wait for the answers."""
        self.sender.flush()

    def events(self) -> list[Event]:
        """The rail's events since the test started, oldest first (flushes first)."""
        self.flush()
        self._collect()
        return list(self.seen)

    def status(self) -> RailStatus:
        self.flush()
        return self.client.status(self.rail_id)

    def _collect(self) -> list[Event]:
        new = list(self.client.iter_events(self.rail_id, after_id=self.checked_id))
        new.reverse()
        if new:
            self.checked_id = new[-1].id
            self.seen.extend(new)
        return new

    def check(self) -> list[str]:
        """Flush, read the events not checked yet, return what fails the test."""
        problems: list[str] = []
        try:
            self.sender.flush()
        except SendFailed as err:
            problems.append(f"samples were not stored, so the rail cannot be judged: {err}")
        self.check_new(problems)
        return problems

    def check_new(self, problems: list[str]) -> None:
        """Append to ``problems`` what the events not checked yet say against the test."""
        before = self.checked_id
        self._collect()
        fresh = [e for e in self.seen if e.id > before]
        for e in offending(fresh, self.settings.fail_on, self.settings.fail_on_overload):
            overloaded = e.kind == "rail.condition" and e.details.get("to") == OVERLOADED
            why = "the rail went overloaded" if overloaded else e.kind
            problems.append(f"{why}: {_describe(e)}")

    def report(self) -> str:
        lines = [f"rail {self.rail_id} at {self.settings.url}: {len(self.seen)} events"]
        lines += [_describe(e) for e in self.seen]
        s = self.sender.stats
        lines.append(
            f"samples: {s.added} added, {s.stored} stored, {s.duplicates} duplicates, "
            f"{s.retries} retries, {s.failed} not stored"
        )
        return "\n".join(lines)


def _fail(problems: list[str], recorder: RailRecorder) -> None:
    head = f"phaseward: rail '{recorder.rail_id}' during this test:"
    pytest.fail("\n".join([head, *(f"  - {p}" for p in problems)]), pytrace=False)


@pytest.fixture(scope="session")
def phaseward_client(pytestconfig: pytest.Config) -> Iterator[Client]:
    """A ``Client`` for the configured service (``--phaseward-url`` / ``phaseward_url``)."""
    url = pytestconfig.getoption("phaseward_url") or str(pytestconfig.getini("phaseward_url"))
    if not url:
        pytest.fail("configure --phaseward-url or the ini option phaseward_url", pytrace=False)
    with Client(str(url)) as client:
        yield client


@pytest.fixture
def phaseward_rail(request: pytest.FixtureRequest) -> Iterator[RailRecorder]:
    """Streams this test's samples to phaseward and fails the test if the rail went
    overloaded (or a ``fail_on`` event kind appeared) while it ran."""
    settings = _settings(request)
    client = Client(settings.url)
    trouble: str | None = None
    try:
        client.get_rail(settings.rail_id)
        newest = client.list_events(settings.rail_id, limit=1).items
    except (PhasewardError, httpx.TransportError) as err:
        trouble = f"phaseward at {settings.url}, rail '{settings.rail_id}': {err}"
    if trouble is not None:
        client.close()
        pytest.fail(trouble, pytrace=False)
    baseline = newest[0].id if newest else 0
    sender = BatchingSender(
        client,
        settings.rail_id,
        batch_size=settings.batch_size,
        max_delay_s=settings.max_delay_s,
        max_buffer=max(10_000, settings.batch_size),
    )
    recorder = RailRecorder(client, settings, sender, baseline_id=baseline, checked_id=baseline)
    request.node.stash[RECORDER] = recorder
    yield recorder
    problems: list[str] = []
    try:
        try:
            sender.close()
        except SendFailed as err:
            problems.append(f"samples were not stored: {err}")
        recorder.check_new(problems)
    finally:
        client.close()
    if problems:
        _fail(problems, recorder)


@pytest.hookimpl(wrapper=True)
def pytest_runtest_call(item: pytest.Item) -> Iterator[None]:
    try:
        result = yield
    except BaseException:
        recorder = item.stash.get(RECORDER, None)
        if recorder is not None:  # the test failed on its own: show what phaseward saw
            try:
                problems = recorder.check()
            except Exception as err:  # never hide the test's own failure
                problems = [f"could not read the events: {err!r}"]
            item.add_report_section("call", "phaseward", "\n".join([*problems, recorder.report()]))
        raise
    recorder = item.stash.get(RECORDER, None)
    if recorder is not None:
        problems = recorder.check()
        item.add_report_section("call", "phaseward", recorder.report())
        if problems:
            _fail(problems, recorder)
    return result
