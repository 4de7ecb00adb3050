"""`constraint-ctrl sequence PLAN.yaml`: run a task plan against the controller over ROS.

It uses nothing but the controller's public interface: SetParametersAtomically for a step's
tunables together with activate_skill, the ~/skills/<skill>/activate Trigger services for steps
without tunables, and ~/events. Progress goes to stdout, one line
per change; --report writes the step durations and the outcome as JSON. Exit code 0 only when
the plan finished.
"""
from __future__ import annotations

import argparse
import json
import queue
import threading
import time
from pathlib import Path
from typing import Any

from ..plan.machine import Activate, Finish, PlanRunner
from ..plan.plan import Plan, load_plan
from .common import config_dir, ros_arguments, split_ros_args, transport_options

NODE_NAME = 'task_sequencer'


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
                         for s in plan.steps}
        self.t0 = time.monotonic()
        self.t0_wall = time.time()

    def _on_event(self, msg: Any) -> None:
        self.events.put((time.monotonic(), str(msg.data)))

    def _log(self, text: str) -> None:
        self.say(f'[{time.monotonic() - self.t0:7.2f} s] {text}', flush=True)

    def _execute(self, action: Activate | Finish | None) -> Finish | None:
        while isinstance(action, Activate):
            step = action.step
            self._log(f'step {action.index + 1}/{len(self.plan.steps)} {step.name}: '
                      f'{step.skill}' + (f' with {dict(step.set)}' if step.set else ''))
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
        Trigger service is used.
        """
        t = self.port.types
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
                                         5.0)
            if reply is None:
                return 'no reply to set_parameters_atomically'
            if not reply.result.successful:
                return f'parameters rejected: {reply.result.reason}'
            return None
        client = self.activate[step.skill]
        if not client.wait_for_service(10.0):
            return f'skill {step.skill!r}: activate service not available'
        reply = client.call(t.Trigger.Request(), 5.0)
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


def run(argv: list[str]) -> int:
    ours, ros = split_ros_args(argv)
    parser = argparse.ArgumentParser(prog='constraint-ctrl sequence',
                                     description='Run a task plan against the controller.')
    parser.add_argument('plan', type=Path, help='plan YAML file')
    transport_options(parser)
    parser.add_argument('--report', type=Path, help='write step durations and outcome (JSON)')
    ros_arguments(parser, f"""\
The plan names the controller node and, per step, the skill, the tunables to set and the event
that ends it (README, "Sequencer and plans"). With the simulator and the controller running
(see constraint-ctrl run --help):
  constraint-ctrl sequence {config_dir() / 'plans' / 'gearbox_assembly.yaml'} --report out/steps.json""")
    args = parser.parse_args(ours)
    plan = load_plan(args.plan)
    from ..transport.port import open_port
    port = open_port(args.transport, NODE_NAME, ros, distro=args.distro)
    spinner = threading.Thread(target=port.spin, daemon=True)
    try:
        sequencer = Sequencer(port, plan)
        spinner.start()
        finish = sequencer.run()
        if args.report:
            args.report.parent.mkdir(parents=True, exist_ok=True)
            report = sequencer.runner.report(sequencer.t0)
            report['t0_wall'] = sequencer.t0_wall
            args.report.write_text(json.dumps(report, indent=2) + '\n')
    finally:
        port.shutdown()             # ends spin() on the spinner thread ...
        if spinner.is_alive():
            spinner.join(timeout=5.0)
        port.shutdown()             # ... then destroys the node and the middleware context
    return 0 if finish.outcome == 'done' else 1


def main(argv: list[str] | None = None) -> int:
    import sys
    from ..cli import report_errors
    return report_errors(run, list(sys.argv[1:] if argv is None else argv))


__all__ = ['Sequencer', 'main', 'run']
