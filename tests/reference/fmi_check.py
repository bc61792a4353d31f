"""Independent FMU check with FMPy (PyPI `fmpy`, a general-purpose FMI 1/2/3 importer).

stdin:  {"fmu": path, "stop_time": s, "step": s,
         "input": [[t, v_re, v_im], ...]  (a terminal-voltage table; repeated times = a jump),
         "start_values": {name: value}}
stdout: {"problems": [text, ...]            fmpy.validation.validate_fmu, "fmi_version": ..,
         "guid": ..., "model_identifier": ..., "outputs": [names], "capabilities": {...},
         "time": [s], "v_re": [..], "v_im": [..], "i_re": [..], "i_im": [..], "p": [..],
         "q": [..], "out_of_envelope": [0/1], "log": [lines]}

The simulation is fmpy.simulate_fmu with fmi_type="CoSimulation" and output_interval = step,
so FMPy calls fmi2DoStep (FMI 3.0: fmi3DoStep) once per step, applies the input table before each step
(after_event=True at a jump) and records the outputs after it. The inputs are recorded too
(fmi2GetReal returns the value FMPy set), so the caller can replay the exact same inputs.
"""

import contextlib
import json
import sys

import numpy as np
from fmpy import read_model_description, simulate_fmu
from fmpy.validation import validate_fmu


def main():
    req = json.load(sys.stdin)
    fmu = req["fmu"]
    problems = [str(p) for p in validate_fmu(fmu)]
    md = read_model_description(fmu, validate=True)
    cs = md.coSimulation
    # f_grid is held at 1 pu (nominal frequency)
    table = np.array(
        [tuple(row) + (1.0,) for row in req["input"]],
        dtype=[("time", np.float64), ("v_re", np.float64), ("v_im", np.float64), ("f_grid", np.float64)],
    )
    log = []

    def logger(*args):
        # FMI 2.0: (environment, instanceName, status, category, message);
        # FMI 3.0: (instanceEnvironment, status, category, message)
        status, category, message = args[-3:]
        log.append(f"{status} {category.decode()} {message.decode()}")

    names = ["v_re", "v_im", "i_re", "i_im", "p", "q", "out_of_envelope"]
    # FMPy prints notes on stdout: keep stdout for the JSON answer
    with contextlib.redirect_stdout(sys.stderr):
        result = simulate_fmu(
            fmu,
            validate=True,
            fmi_type="CoSimulation",
            start_time=0.0,
            stop_time=req["stop_time"],
            output_interval=req["step"],
            input=table,
            output=names,
            start_values=req.get("start_values", {}),
            logger=logger,
        )
    answer = {
        "problems": problems,
        "fmi_version": md.fmiVersion,
        "guid": md.guid,
        "model_identifier": cs.modelIdentifier,
        "outputs": [v.variable.name for v in md.outputs],
        "initial_unknowns": [v.variable.name for v in md.initialUnknowns],
        "capabilities": {
            "canGetAndSetFMUstate": bool(getattr(cs, "canGetAndSetFMUstate", False)),
            "canSerializeFMUstate": bool(getattr(cs, "canSerializeFMUstate", False)),
            "canHandleVariableCommunicationStepSize": bool(cs.canHandleVariableCommunicationStepSize),
        },
        "default_step": float(md.defaultExperiment.stepSize) if md.defaultExperiment else None,
        "time": [float(t) for t in result["time"]],
        "log": log,
    }
    for name in names:
        answer[name] = [float(v) for v in result[name]]
    print(json.dumps(answer))


if __name__ == "__main__":
    main()
