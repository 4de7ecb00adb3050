"""`constraint-ctrl sequence PLAN.yaml`: run a task plan against the controller over ROS.

It uses nothing but the controller's public interface: SetParametersAtomically for a step's
tunables together with activate_skill, the ~/skills/<skill>/activate Trigger services for steps
without tunables, ~/hold, ~/events, and, before the first step, the ROS graph (the node's
services) and ListParameters to check that the controller offers every skill and tunable the
plan names (plan/offer.py): a plan that names one it lacks fails at once, before anything
moves, with the plan file's line and a did-you-mean (exit code 2).

Every plan that started ends in the controller's built-in hold (zero velocity, watchdog
active): when it is done, when it aborts (a step timed out, an activation failed, the watchdog
kept the arm stopped too long), and, best effort, when the sequencer is interrupted (SIGINT or
SIGTERM: a second signal does not cut the hold call short) or fails. Without that the last
skill would go on running after the plan (a steady skill keeps moving the arm).

Progress goes to stdout, one line per change; --report writes the step durations, the outcome
and the hold's reply as JSON. Exit code 0 only when the plan finished and the controller
confirmed the hold; 1 when it aborted or the hold failed; 2 for a plan the controller cannot
run; 130 (SIGINT) or 143 (SIGTERM) when interrupted.
"""
from __future__ import annotations

import argparse
import json
import queue
import signal
import threading
import time
from pathlib import Path
from typing import Any

from ..plan.machine import Activate, Finish, PlanRunner
from ..plan.offer import Offer, combined, plan_problems, skills_from_services
from ..plan.plan import HOLD, Plan, load_plan
from ..transport.signals import STOP_SIGNALS, ignore_stop_signals
from .common import config_dir, ros_arguments, split_ros_args, transport_options

NODE_NAME = 'task_sequencer'
#: How long to wait for the controller's services to appear (s).
SERVICE_WAIT_S = 10.0
#: How long the skills named by the plan may take to appear in the ROS graph once the
#: controller answers (discovery of a node's services lags behind its first service) ...
GRAPH_WAIT_S = 5.0
#: ... unless the node's services have stopped changing for this long (then a skill still
#: missing is not coming: a misspelt name fails in about this time, not GRAPH_WAIT_S).
GRAPH_STABLE_S = 1.0
#: Wait for a reply (an activation or a hold answers after one control tick; the controller
#: gives up on a switch after 3 s).
REPLY_S = 5.0
#: When interrupted: the shorter waits of a best-effort hold.
INTERRUPTED_WAIT_S = 2.0


class Interrupted(Exception):
    """SIGINT or SIGTERM arrived while the plan ran (raised in the main thread)."""

    def __init__(self, signum: int) -> None:
        self.signum = signum
        super().__init__(signal.Signals(signum).name)


def _interrupt(signum: int, frame: object) -> None:
    raise Interrupted(signum)


class Sequencer:
    def __init__(self, port: Any, plan: Plan, out: Any = print) -> None:
        self.port = port
        self.plan = plan
        self.runner = PlanRunner(plan)
        self.say = out
        self.events: queue.Queue[tuple[float, str]] = queue.Queue()
        t = port.types
        port.create_subscription(t.String, f'{plan.controller}/events', self._on_event,
                                 'default')
        self.set_params = port.create_client(t.SetParametersAtomically,
                                             f'{plan.controller}/set_parameters_atomically')
        self.activate = {s.skill: port.create_client(t.Trigger,
                                                     f'{plan.controller}/skills/{s.skill}/activate')
                         for s in plan.steps if s.skill != HOLD}
        self.hold_client = port.create_client(t.Trigger, f'{plan.controller}/{HOLD}')
        self.list_parameters = port.create_client(t.ListParameters,
                                                  f'{plan.controller}/list_parameters')
        self.hold_reply: dict[str, Any] | None = None   # the ending hold's outcome
        self.t0 = time.monotonic()
        self.t0_wall = time.time()

    # ------------------------------------------------------------ before the first step
    def offer(self) -> Offer | str:
        """What the controller offers (its skills from the ROS graph, its parameter names),
        or why it cannot be asked."""
        t = self.port.types
        controller = self.plan.controller
        if not self.list_parameters.wait_for_service(SERVICE_WAIT_S):
            return (f'the controller {controller} is not available (no '
                    f'{controller}/list_parameters within {SERVICE_WAIT_S:g} s)')
        reply = self.list_parameters.call(t.ListParameters.Request(prefixes=[], depth=0),
                                          REPLY_S)
        if reply is None:
            return f'no reply from {controller}/list_parameters'
        parameters = frozenset(reply.result.names)
        namespace, _, base = controller.rpartition('/')
        needed = {s.skill for s in self.plan.steps if s.skill != HOLD}
        deadline = time.monotonic() + GRAPH_WAIT_S
        seen: frozenset[str] = frozenset()
        changed = time.monotonic()
        while True:
            try:
                served = frozenset(name for name, _ in self.port.get_service_names_and_types_by_node(
                    base, namespace or '/'))
            except Exception:  # noqa: BLE001 - rclpy: node not in the graph yet
                served = frozenset()
            now = time.monotonic()
            if served != seen:
                seen, changed = served, now
            skills = skills_from_services(controller, served)
            hold = f'{controller}/{HOLD}' in served
            if (needed <= skills and hold) or now >= deadline or \
                    (hold and now - changed >= GRAPH_STABLE_S):
                return Offer(skills, parameters, hold)
            time.sleep(0.1)

    def check(self) -> Finish | None:
        """Raise a located PlanError when the controller lacks what the plan names; a Finish
        (aborted) when the controller cannot be asked; None when the plan can start."""
        offer = self.offer()
        if isinstance(offer, str):
            self._log(f'plan aborted before its first step: {offer}')
            return self.runner.refused(offer, time.monotonic())
        problems = plan_problems(self.plan, offer)
        if problems:
            self._log(f'plan refused before its first step: {len(problems)} problem(s)')
            raise combined(problems)
        return None

    # ------------------------------------------------------------ the end: hold
    def hold(self, wait_s: float = SERVICE_WAIT_S, reply_s: float = REPLY_S) -> tuple[bool, str]:
        """Put the controller in its built-in hold; (ok, its reply or why not)."""
        client = self.hold_client
        if not client.wait_for_service(wait_s):
            return False, f'{self.plan.controller}/{HOLD} is not available'
        reply = client.call(self.port.types.Trigger.Request(), reply_s)
        if reply is None:
            return False, f'no reply from {self.plan.controller}/{HOLD} within {reply_s:g} s'
        return bool(reply.success), str(reply.message)

    def end_in_hold(self, best_effort: bool = False) -> bool:
        """The last thing a started plan does; logged and kept for the report."""
        waits = (INTERRUPTED_WAIT_S, INTERRUPTED_WAIT_S) if best_effort else \
            (SERVICE_WAIT_S, REPLY_S)
        try:
            ok, message = self.hold(*waits)
        except Exception as exc:  # noqa: BLE001 - best effort: say so, never hide the cause
            ok, message = False, f'the hold call failed: {exc!r}'
        self.hold_reply = {'ok': ok, 'message': message}
        self._log(f'controller holds: {message}' if ok else f'HOLD FAILED: {message}')
        return ok

    def _on_event(self, msg: Any) -> None:
        self.events.put((time.monotonic(), str(msg.data)))

    def _log(self, text: str) -> None:
        self.say(f'[{time.monotonic() - self.t0:7.2f} s] {text}', flush=True)

    def _execute(self, action: Activate | Finish | None) -> Finish | None:
        while isinstance(action, Activate):
            step = action.step
            self._log(f'step {action.index + 1}/{len(self.plan.steps)} {step.name}: '
                      f'{step.skill}' + (f' with {dict(step.set)}' if step.set else '')
                      + (f' for {step.duration:g} s' if step.duration is not None else ''))
            problem = self._apply(step)
            if problem:
                action = self.runner.activation_failed(problem, time.monotonic())
                break
            self.runner.activated(time.monotonic())
            action = None
        if isinstance(action, Finish):
            self._log(f'plan {action.outcome}: {action.reason}')
            return action
        return None

    def _apply(self, step: Any) -> str | None:
        """Activate the step's skill; with tunables, in one atomic parameter call.

        SetParametersAtomically with the tunables and activate_skill = <skill> makes the
        controller apply both in the same tick, so a new goal never reaches a skill that is
        still running (consecutive steps often reuse one skill). Without tunables the skill's
        Trigger service is used; the built-in hold is ~/hold.
        """
        t = self.port.types
        if step.skill == HOLD:
            ok, message = self.hold()
            return None if ok else f'hold refused: {message}'
        if step.set:
            def double(name: str, value: float) -> Any:
                return t.Parameter(name=name, value=t.ParameterValue(
                    type=t.ParameterType.PARAMETER_DOUBLE, double_value=float(value)))
            params = [double(f'{step.skill}.{name}', value) for name, value in step.set.items()]
            params.append(t.Parameter(name='activate_skill', value=t.ParameterValue(
                type=t.ParameterType.PARAMETER_STRING, string_value=step.skill)))
            if not self.set_params.wait_for_service(10.0):
                return f'{self.plan.controller}/set_parameters_atomically is not available'
            reply = self.set_params.call(t.SetParametersAtomically.Request(parameters=params),
                                         REPLY_S)
            if reply is None:
                return 'no reply to set_parameters_atomically'
            if not reply.result.successful:
                return f'parameters rejected: {reply.result.reason}'
            return None
        client = self.activate[step.skill]
        if not client.wait_for_service(10.0):
            return f'skill {step.skill!r}: activate service not available'
        reply = client.call(t.Trigger.Request(), REPLY_S)
        if reply is None:
            return f'no reply from the activate service of {step.skill}'
        if not reply.success:
            return reply.message
        return None

    def run(self) -> Finish:
        finish = self._execute(self.runner.start(time.monotonic()))
        while finish is None:
            try:
                stamp, name = self.events.get(timeout=0.05)
            except queue.Empty:
                finish = self._execute(self.runner.tick(time.monotonic()))
                continue
            before, step = self.runner.state, self.runner.step
            if step is not None and self.runner.armed and name == step.done_when:
                self._log(f'{step.name}: {name}')
            action = self.runner.on_event(name, stamp)
            if self.runner.state != before and self.runner.state in ('paused', 'running'):
                self._log(f'{step.name if step else "?"}: {self.runner.state} ({name})')
            finish = self._execute(action) or self._execute(self.runner.tick(time.monotonic()))
        return finish

    def run_plan(self) -> Finish:
        """Check the plan against the controller, run it, end in hold (see the module
        docstring). Interrupted raises on after the best-effort hold."""
        refused = self.check()
        if refused is not None:
            return refused
        try:
            finish = self.run()
        except Interrupted as exc:
            ignore_stop_signals()       # a second Ctrl-C must not cut the hold short
            self.runner.interrupted(f'interrupted by {exc}', time.monotonic())
            self._log(f'plan interrupted by {exc}; holding the controller')
            self.end_in_hold(best_effort=True)
            raise
        except BaseException:
            if self.runner.state != 'waiting':
                ignore_stop_signals()
                self.end_in_hold(best_effort=True)
            raise
        ignore_stop_signals()           # the plan is over: let nothing cut the hold short
        self.end_in_hold()
        return finish

    def report(self) -> dict[str, Any]:
        report = self.runner.report(self.t0)
        report['t0_wall'] = self.t0_wall
        report['hold'] = self.hold_reply
        return report


def run(argv: list[str]) -> int:
    ours, ros = split_ros_args(argv)
    parser = argparse.ArgumentParser(prog='constraint-ctrl sequence',
                                     description='Run a task plan against the controller.')
    parser.add_argument('plan', type=Path, help='plan YAML file')
    transport_options(parser)
    parser.add_argument('--report', type=Path, help='write step durations and outcome (JSON)')
    ros_arguments(parser, f"""\
The plan names the controller node and, per step, the skill (or hold), the tunables to set and
the event that ends it or its duration (README, "Sequencer and plans"). The plan is checked
against what the controller offers before its first step; it always ends in the controller's
hold. With the simulator and the controller running (see constraint-ctrl run --help):
  constraint-ctrl sequence {config_dir() / 'plans' / 'gearbox_assembly.yaml'} --report out/steps.json""")
    args = parser.parse_args(ours)
    plan = load_plan(args.plan)
    from ..transport.port import open_port
    port = open_port(args.transport, NODE_NAME, ros, distro=args.distro)
    spinner = threading.Thread(target=port.spin, daemon=True)
    sequencer: Sequencer | None = None
    for sig in STOP_SIGNALS:        # both end the plan the same way: in hold (run_plan)
        signal.signal(sig, _interrupt)
    try:
        sequencer = Sequencer(port, plan)
        spinner.start()
        finish = sequencer.run_plan()
        held = sequencer.hold_reply is not None and sequencer.hold_reply['ok']
        code = 0 if finish.outcome == 'done' and held else 1
    except Interrupted as exc:
        code = 128 + exc.signum
    finally:
        ignore_stop_signals()       # shutting down: finish that (and the report)
        if args.report and sequencer is not None and sequencer.runner.state != 'waiting':
            args.report.parent.mkdir(parents=True, exist_ok=True)
            args.report.write_text(json.dumps(sequencer.report(), indent=2) + '\n')
        port.shutdown()             # ends spin() on the spinner thread ...
        if spinner.is_alive():
            spinner.join(timeout=5.0)
        port.shutdown()             # ... then destroys the node and the middleware context
    return code


def main(argv: list[str] | None = None) -> int:
    import sys
    from ..cli import report_errors
    return report_errors(run, list(sys.argv[1:] if argv is None else argv))


__all__ = ['Sequencer', 'main', 'run']
