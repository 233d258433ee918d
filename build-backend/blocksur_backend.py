"""The PEP 517 backend of `pip wheel .` / `pip install .`: maturin's, plus one rule.

maturin's own PEP 517 hooks build with `--compatibility off` (a plain `linux_*` tag, nothing
audited) unless the frontend passes a compatibility in the config settings or in
MATURIN_PEP517_ARGS, so the `compatibility` of `[tool.maturin]` only reached `maturin build`.
Here it reaches every wheel pip builds on a glibc Linux at least as new as that policy: maturin
then checks the extension's glibc symbol versions and external libraries against the policy and
tags the wheel `manylinux_X_Y`. A compatibility given by the caller wins (for example
`MATURIN_PEP517_ARGS="--features lapack --compatibility off"`); other systems (musl, macOS,
Windows, an older glibc) get maturin's own default.
"""

from __future__ import annotations

import os
import platform
import re
import shlex
import sys
from collections.abc import Mapping
from typing import Any

import maturin
from maturin import (
    build_editable,
    build_sdist,
    get_requires_for_build_editable,
    get_requires_for_build_sdist,
    get_requires_for_build_wheel,
    prepare_metadata_for_build_editable,
)

__all__ = [
    "build_editable",
    "build_sdist",
    "build_wheel",
    "get_requires_for_build_editable",
    "get_requires_for_build_sdist",
    "get_requires_for_build_wheel",
    "prepare_metadata_for_build_editable",
    "prepare_metadata_for_build_wheel",
]


def _policy() -> str | None:
    """`[tool.maturin] compatibility` if it is a manylinux policy this machine's glibc meets."""
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10: maturin installs tomli there
        import tomli as tomllib
    with open("pyproject.toml", "rb") as f:
        policy = tomllib.load(f).get("tool", {}).get("maturin", {}).get("compatibility")
    wanted = re.fullmatch(r"manylinux_(\d+)_(\d+)", policy or "")
    libc, version = platform.libc_ver()
    if not wanted or not sys.platform.startswith("linux") or libc != "glibc":
        return None
    have = tuple(int(part) for part in version.split(".")[:2])
    return policy if have >= (int(wanted[1]), int(wanted[2])) else None


def _with_policy(config_settings: Mapping[str, Any] | None) -> dict[str, Any]:
    settings = dict(config_settings or {})
    given = settings.pop("maturin.build-args", settings.pop("build-args", None))
    if given is None:
        given = os.environ.get("MATURIN_PEP517_ARGS", "")
    args = shlex.split(given) if isinstance(given, str) else list(given)
    policy = _policy()
    if policy and not any(a.split("=")[0] in ("--compatibility", "--manylinux") for a in args):
        args = ["--compatibility", policy, *args]
    settings["maturin.build-args"] = shlex.join(args)
    return settings


def build_wheel(
    wheel_directory: str,
    config_settings: Mapping[str, Any] | None = None,
    metadata_directory: str | None = None,
) -> str:
    return str(maturin.build_wheel(wheel_directory, _with_policy(config_settings), metadata_directory))


def prepare_metadata_for_build_wheel(metadata_directory: str, config_settings: Mapping[str, Any] | None = None) -> str:
    return str(maturin.prepare_metadata_for_build_wheel(metadata_directory, _with_policy(config_settings)))
