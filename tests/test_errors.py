"""The one-line input error survives pickling (it crosses to and from worker processes)."""

from __future__ import annotations

import pickle

from simbench.errors import InputError, Where


def test_an_input_error_pickles_whole():
    error = InputError(Where("spec.yaml", 3, 7, field="grid.size"), "got 0", "8 to 4096")
    again = pickle.loads(pickle.dumps(error))
    assert type(again) is InputError
    assert str(again) == str(error) == "spec.yaml:3:7: grid.size: got 0 (valid: 8 to 4096)"
    assert (again.where, again.problem, again.valid) == (error.where, error.problem, error.valid)
