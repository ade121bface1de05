"""Code written against the flat layout (0.1.0) keeps importing: every old module path is the
module at its new path, with a DeprecationWarning that names it."""

from __future__ import annotations

import importlib
import subprocess
import sys
import warnings

import pytest

import sgdstab


@pytest.mark.parametrize("old", sorted(sgdstab.MOVED_MODULES))
def test_an_old_module_path_is_the_moved_module(old):
    new = importlib.import_module(f"sgdstab.{sgdstab.MOVED_MODULES[old]}")
    sys.modules.pop(f"sgdstab.{old}", None)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        module = importlib.import_module(f"sgdstab.{old}")
    assert module is new
    # the moved module keeps its own identity: relative imports inside it still resolve quietly
    assert module.__spec__.name == new.__name__ and module.__package__ == new.__spec__.parent
    assert any(issubclass(w.category, DeprecationWarning) and new.__name__ in str(w.message)
               for w in caught)


def test_the_documented_0_1_import_of_readings_to_frame_still_works():
    code = ("from sgdstab.reading import readings_to_frame; import sgdstab; "
            "assert readings_to_frame is sgdstab.readings_to_frame; "
            "import sgdstab.tracker as t; assert t.StabilityTracker is sgdstab.StabilityTracker")
    subprocess.run([sys.executable, "-W", "error::UserWarning", "-c", code], check=True)


def test_an_old_theory_path_still_loads_no_torch():
    code = ("import sys, sgdstab.divergence, sgdstab.planner, sgdstab.assessment; "
            "assert 'torch' not in sys.modules, 'torch was imported'")
    subprocess.run([sys.executable, "-c", code], check=True)


def test_a_name_that_never_existed_is_still_an_import_error():
    with pytest.raises(ModuleNotFoundError):
        importlib.import_module("sgdstab.no_such_module")
