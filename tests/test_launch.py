"""Starting the command: malloc's huge-page tunable (stablefilt._launch) and
the lazy public names of ``import stablefilt``.

Sources: the tunable's name ``glibc.malloc.hugetlb`` and its first release,
glibc 2.35, are from the glibc manual ("Memory Allocation Tunables") and
the 2.35 release notes; the format of
``/sys/kernel/mm/transparent_hugepage/enabled`` (the selected mode in
brackets) from the Linux kernel's admin guide (``transhuge.rst``); lazy
loading of public names from Scientific Python's SPEC 1.
"""

from __future__ import annotations

import importlib
import os
import platform
import subprocess
import sys

import pytest

import stablefilt
from stablefilt import _launch, _malloc

LINUX = ("Linux", ("glibc", "2.36"), "madvise")


def test_tunable_added_where_it_helps():
    env = _launch.relaunch_env({"PATH": "/bin"}, *LINUX)
    assert env == {"PATH": "/bin", "GLIBC_TUNABLES": "glibc.malloc.hugetlb=1"}


def test_other_tunables_kept():
    env = _launch.relaunch_env({"GLIBC_TUNABLES": "glibc.malloc.arena_max=2"}, *LINUX)
    assert env["GLIBC_TUNABLES"] == "glibc.malloc.arena_max=2:glibc.malloc.hugetlb=1"


@pytest.mark.parametrize("tunables", ["glibc.malloc.hugetlb=0", "glibc.malloc.arena_max=2:glibc.malloc.hugetlb=2"])
def test_a_setting_of_the_user_is_left(tunables):
    assert _launch.relaunch_env({"GLIBC_TUNABLES": tunables}, *LINUX) is None


@pytest.mark.parametrize("system, libc, mode", [
    ("Darwin", ("", ""), "madvise"),             # not Linux
    ("Linux", ("", ""), "madvise"),              # musl or unknown C library
    ("Linux", ("glibc", "2.34"), "madvise"),     # before the tunable existed
    ("Linux", ("glibc", "2.36"), "never"),       # huge pages turned off
    ("Linux", ("glibc", "2.36"), None),          # kernel without the file
])
def test_no_new_start_where_it_cannot_help(system, libc, mode):
    assert _launch.relaunch_env({}, system, libc, mode) is None


@pytest.mark.parametrize("tunables, value, on", [
    ("", None, False), ("glibc.malloc.arena_max=2", None, False), ("glibc.malloc.hugetlb=0", "0", False),
    ("glibc.malloc.arena_max=2: glibc.malloc.hugetlb=2 ", "2", True), ("glibc.malloc.hugetlb=1", "1", True),
])
def test_tunable_read_from_the_list(tunables, value, on):
    env = {"GLIBC_TUNABLES": tunables}
    assert _malloc.hugetlb_setting(env) == value
    assert _malloc.hugepages_on(env) is on


def test_new_glibc_versions_compare_as_numbers():
    assert _launch.relaunch_env({}, "Linux", ("glibc", "2.100"), "always") is not None
    assert _launch.relaunch_env({}, "Linux", ("glibc", "3.0"), "always") is not None


@pytest.mark.parametrize("text, mode", [("always [madvise] never\n", "madvise"), ("[always] madvise never\n", "always"),
                                        ("always madvise [never]\n", "never"), ("garbage\n", None)])
def test_thp_mode_read(tmp_path, text, mode):
    f = tmp_path / "enabled"
    f.write_text(text)
    assert _launch.thp_mode(str(f)) == mode
    assert _launch.thp_mode(str(tmp_path / "missing")) is None


def _clean_env():
    env = {k: v for k, v in os.environ.items() if k != "GLIBC_TUNABLES"}
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [os.getcwd(), env.get("PYTHONPATH")]))
    return env


def test_process_starts_again_with_the_tunable_once():
    """The new start keeps the arguments and runs the code once more, with the
    tunable set; where it cannot help (per this machine) nothing changes."""
    snippet = ("import os, sys; from stablefilt._launch import relaunch; relaunch(); "
               "print(os.environ.get('GLIBC_TUNABLES'), sys.argv[1:])")
    env = _clean_env()
    out = subprocess.run([sys.executable, "-c", snippet, "one", "two words"], capture_output=True, text=True,
                         env=env, timeout=60)
    assert out.returncode == 0, out.stderr
    helps = _launch.relaunch_env(env, platform.system(), platform.libc_ver(), _launch.thp_mode()) is not None
    expected = _malloc.TUNABLE if helps else None
    assert out.stdout.strip() == f"{expected} ['one', 'two words']"


def test_import_loads_no_jax():
    """``import stablefilt`` (and the command line's module) loads no JAX until a name needs it."""
    code = ("import sys, stablefilt, stablefilt.cli; a = 'jax' in sys.modules; "
            "stablefilt.apply_filter; print(a, 'jax' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=_clean_env(), timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == ["False", "True"]


def test_public_names_resolve_to_their_modules():
    assert len(stablefilt.__all__) == len(set(stablefilt.__all__))
    for name, module in stablefilt._PUBLIC.items():
        assert getattr(stablefilt, name) is getattr(importlib.import_module(f"stablefilt.{module}"), name)
        assert name in dir(stablefilt)
    with pytest.raises(AttributeError, match="no attribute 'not_a_name'"):
        stablefilt.not_a_name  # noqa: B018


def test_module_entry_runs_the_command():
    out = subprocess.run([sys.executable, "-m", "stablefilt", "--version"], capture_output=True, text=True,
                         env=_clean_env(), timeout=60)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == f"stablefilt {stablefilt.__version__}"
