import pytest

import fieldplan
from fieldplan import ActuatorError
from fieldplan.registry import available_actuators, load_actuator, load_actuator_class


def test_registered_names_and_close_match_hint():
    names = available_actuators()
    assert {"coil-array", "plate", "electrode-array", "source-array", "calibrated"} <= set(names)
    with pytest.raises(ActuatorError, match="Did you mean 'coil-array'"):
        load_actuator_class("coil-aray")


def test_module_class_from_the_current_folder(tmp_path, monkeypatch):
    (tmp_path / "myflows.py").write_text(
        "import numpy as np\nimport fieldplan\n"
        "class Conveyor(fieldplan.Actuator):\n"
        "    tags = frozenset({'affine_in_input'})\n"
        "    channels = (fieldplan.Channel('pump', '1', -1, 1),)\n"
        "    def _velocity(self, body, medium, xy, u):\n"
        "        return np.tile([u[0] * 1e-5, 0.0], (len(xy), 1))\n")
    monkeypatch.chdir(tmp_path)
    act = load_actuator("myflows:Conveyor")
    assert isinstance(act, fieldplan.Actuator)
    with pytest.raises(ActuatorError, match="cannot import module 'nosuchmodule'"):
        load_actuator("nosuchmodule:Thing")
    with pytest.raises(ActuatorError, match="has no attribute 'Missing'"):
        load_actuator("myflows:Missing")
    with pytest.raises(ActuatorError, match="bad parameters"):
        load_actuator("source-array", bogus=1)
