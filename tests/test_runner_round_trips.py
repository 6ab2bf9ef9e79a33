"""What the runner sends per shot once the bench is set up, and after a reconnect.

Unchanged settings are not sent again and no error queue is drained when nothing was
configured (IEEE 488.2 / SCPI: the error queue holds what the instrument reported about the
commands it received; with no new setting there is nothing new to report). A session that had
to reconnect makes the station send every setting again (the instrument may have restarted).
Every repeat at one condition must therefore send exactly the same commands.
"""

from __future__ import annotations

from collections import Counter, defaultdict

from test_runner_support import BENCH, write_sequence

from benchrun.config import load_bench, load_sequence
from benchrun.instruments import session as session_module
from benchrun.runner.execute import RunOptions, run_sequence
from benchrun.runner.simbench import simulated_bench

#: commands a steady-state shot must not send (settings and error-queue drains)
SETTINGS_HEADS = ("SYSTem:ERRor?", "SOURce:PULSe:COUNt", "SOURce:PULSe:WIDTh",
                  "GDRive:SECond:WIDTh", "GDRive:GAP", "GDRive:RESistance", "OUTPut:STATe",
                  "OUTPut:STATe?")
#: the output watchdogs' refresh runs on a timer, not per shot: left out of the counts
TIMER_HEADS = ("WDOG:REFResh",)


def test_steady_shots_send_no_settings_and_a_reconnect_sends_them_again(tmp_path,
                                                                         monkeypatch):
    sent: list[tuple[str, str]] = []  # (resource, command) in order
    sessions: list[session_module.InstrumentSession] = []
    cls = session_module.InstrumentSession
    original = {name: getattr(cls, name) for name in ("__init__", "write", "query",
                                                      "query_block")}

    def init(self, *a, **k):
        original["__init__"](self, *a, **k)
        sessions.append(self)

    def recorder(name):
        def call(self, command, *a, **k):
            sent.append((self.resource, command))
            return original[name](self, command, *a, **k)
        return call

    monkeypatch.setattr(cls, "__init__", init)
    for name in ("write", "query", "query_block"):
        monkeypatch.setattr(cls, name, recorder(name))

    seq = write_sequence(tmp_path, devices="[SN0117-001]", temperatures="[25 degC]",
                         repeats=6)
    seq.write_text(seq.read_text().replace("shot_spacing: 0.02 s", "shot_spacing: 0 s"))
    marks: list[int] = []  # index into `sent` when each shot was stored

    with simulated_bench(load_bench(BENCH), load_sequence(seq)) as sim:
        roles = {resource: role for role, resource in sim.resources.items()}

        def stored(result):
            marks.append(len(sent))
            if len(marks) == 4:  # the scope's connection re-opened between shots 4 and 5
                next(s for s in sessions if roles[s.resource] == "scope").reconnect()

        options = RunOptions(out_dir=tmp_path / "out", sim_resources=sim.resources,
                             clock=sim.clock, ratings_lookup=sim.ratings,
                             show_progress=False, on_stored=stored)
        outcome = run_sequence(seq, BENCH, options)
    assert outcome.status == "complete" and len(marks) == 6

    def shot(k: int) -> dict[str, Counter]:
        """Commands per role sent between stored shots k-1 and k (k >= 1)."""
        per_role: dict[str, Counter] = defaultdict(Counter)
        for resource, command in sent[marks[k - 1]:marks[k]]:
            if command.split()[0] not in TIMER_HEADS:
                per_role[roles[resource]][command.split()[0]] += 1
        return per_role

    steady = [shot(k) for k in (1, 2, 3)]
    for commands in steady:
        for role, counter in commands.items():
            assert not set(counter) & set(SETTINGS_HEADS), (role, counter)
        # output state remembered
        assert commands["pulse"] == Counter({"INITiate:IMMediate": 1})
        assert commands["thermal"] == Counter({"MEASure:TEMPerature?": 1})
        assert commands["handler"] == Counter({"HANDler:DUT:SELect?": 1})  # asked every shot
        # one bus read-back per shot, no set-point sent again
        assert commands["supply"] == Counter({"MEASure:VOLTage:DC?": 1})
        assert commands["scope"]["TRACe:DATA?"] == 3
    # every steady shot sends the same scope commands (completion polls may differ)
    poll = "STATus:OPERation:CONDition?"
    without_polls = [{r: c - Counter({poll: c[poll]})
                      for r, c in commands.items()} for commands in steady]
    assert without_polls[0]["scope"] == without_polls[1]["scope"] == without_polls[2]["scope"]

    after_reconnect = shot(4)
    assert after_reconnect["scope"]["SYSTem:ERRor?"] >= 1  # scope configured again
    assert after_reconnect["pulse"]["OUTPut:STATe?"] == 1  # output state asked again
    assert after_reconnect["pulse"]["SOURce:PULSe:COUNt"] == 1
    assert not set(shot(5)["scope"]) & set(SETTINGS_HEADS)  # and then remembered again
