"""A small Dockerfile parser for tests that hold the Dockerfile against other deployment files.

No Docker engine runs here, so the Dockerfile is read following the Dockerfile reference's rules
for comments, line continuations and the exec form.
"""

from __future__ import annotations

import json
import re
import shlex
from collections.abc import Iterator
from dataclasses import dataclass, field


@dataclass
class Stage:
    name: str
    base: str
    env: dict[str, str] = field(default_factory=dict)
    args: dict[str, str] = field(default_factory=dict)
    user: str | None = None
    cmd: list[str] | None = None
    healthcheck: list[str] | None = None
    expose: list[str] = field(default_factory=list)
    runs: list[str] = field(default_factory=list)
    copies: list[list[str]] = field(default_factory=list)


Parsed = tuple[dict[str, str], list[Stage]]


def instructions(text: str) -> Iterator[tuple[str, str]]:
    """(KEYWORD, arguments) pairs, continuation lines joined and comment lines dropped."""
    pending = ""
    for raw in text.splitlines():
        stripped = raw.strip()
        if stripped.startswith("#") or (not stripped and not pending):
            continue
        if stripped.endswith("\\"):
            pending += stripped[:-1] + " "
            continue
        line = (pending + stripped).strip()
        pending = ""
        keyword, _, rest = line.partition(" ")
        yield keyword.upper(), rest.strip()
    assert not pending, "the Dockerfile ends inside a continued line"


def exec_form(args: str) -> list[str]:
    value = json.loads(args)
    assert isinstance(value, list) and all(isinstance(v, str) for v in value), f"not the exec form: {args}"
    return value


def parse_dockerfile(text: str) -> Parsed:
    """Global ARGs and the stages in order, each with what it sets itself (not inherited)."""
    global_args: dict[str, str] = {}
    stages: list[Stage] = []
    for keyword, args in instructions(text):
        if keyword == "FROM":
            words = args.split()
            base = re.sub(r"\$\{(\w+)\}", lambda m: global_args[m.group(1)], words[0])
            name = words[2] if len(words) == 3 and words[1].upper() == "AS" else f"stage-{len(stages)}"
            stages.append(Stage(name=name, base=base))
            continue
        if keyword == "ARG":
            name, _, default = args.partition("=")
            (stages[-1].args if stages else global_args)[name] = default
            continue
        stage = stages[-1]
        if keyword == "ENV":
            for item in shlex.split(args):
                key, _, value = item.partition("=")
                stage.env[key] = value
        elif keyword == "USER":
            stage.user = args
        elif keyword == "CMD":
            stage.cmd = exec_form(args)
        elif keyword == "HEALTHCHECK":
            if args.upper() == "NONE":
                stage.healthcheck = []
                continue
            options, _, command = args.partition("CMD ")
            assert all(o.startswith("--") for o in options.split()), f"HEALTHCHECK options: {options}"
            stage.healthcheck = exec_form(command)
        elif keyword == "EXPOSE":
            stage.expose += args.split()
        elif keyword == "RUN":
            stage.runs.append(args)
        elif keyword == "COPY":
            stage.copies.append(args.split())
    return global_args, stages


def effective(stages: list[Stage], name: str) -> Stage:
    """A stage with what it inherits from the stages it is built FROM (env, user, cmd, ...)."""
    by_name = {s.name: s for s in stages}
    chain = [by_name[name]]
    while chain[-1].base in by_name:
        chain.append(by_name[chain[-1].base])
    out = Stage(name=name, base=chain[-1].base)
    for s in reversed(chain):
        out.env.update(s.env)
        out.user = s.user or out.user
        out.cmd = s.cmd or out.cmd
        out.healthcheck = out.healthcheck if s.healthcheck is None else s.healthcheck
        out.expose += s.expose
        out.runs += s.runs
    return out


__all__ = ["Parsed", "Stage", "effective", "exec_form", "instructions", "parse_dockerfile"]
