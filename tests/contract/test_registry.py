import pytest

import fieldplan
from fieldplan import ActuatorError
from fieldplan.contract.registry import available_actuators, load_actuator, load_actuator_class


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


def test_scenario_style_loading_imports_only_allowed_modules(tmp_path, monkeypatch):
    """A module named in a file is imported only if registered or allowed (importing runs its code)."""
    from fieldplan.contract.registry import is_registered_module

    pkg = tmp_path / "labmodels"
    pkg.mkdir()
    (pkg / "__init__.py").write_text("")
    (pkg / "flows.py").write_text(
        "import numpy as np\nimport fieldplan\n"
        "class Pump(fieldplan.Actuator):\n"
        "    tags = frozenset({'affine_in_input'})\n"
        "    channels = (fieldplan.Channel('pump', '1', -1, 1),)\n"
        "    def _velocity(self, body, medium, xy, u):\n"
        "        return np.tile([u[0] * 1e-5, 0.0], (len(xy), 1))\n")
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("FIELDPLAN_CONFIG", str(tmp_path / "none.yaml"))
    assert is_registered_module("fieldplan.actuators.magnetic") and is_registered_module("fieldplan.contract.testing")
    assert is_registered_module("actuators.magnetic")   # the earlier name of the same module
    assert not is_registered_module("labmodels.flows")
    with pytest.raises(ActuatorError, match="--allow-module labmodels.flows"):
        load_actuator_class("labmodels.flows:Pump", allow_modules=())
    with pytest.raises(ActuatorError, match="not a registered"):
        load_actuator_class("labmodels.flows:Pump", allow_modules=("labmodel",))   # not a package prefix
    seen = []
    cls = load_actuator_class("labmodels.flows:Pump", allow_modules=("labmodels",),
                              on_import=lambda *a: seen.append(a))                  # the package allows it
    assert cls.__name__ == "Pump" and seen[0][0] == "labmodels.flows"
    assert seen[0][1] == str(pkg / "flows.py") and "--allow-module labmodels" in seen[0][2]
    # registered plug-ins and fieldplan's own modules need no permission
    assert load_actuator_class("fieldplan.contract.testing:SourceArray", allow_modules=()).__name__ == "SourceArray"
