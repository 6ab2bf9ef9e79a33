"""How the fixture sets di/dt: the bench file's ``fixture.gate_drive`` block.

A test point that asks for a di/dt (``didt: 800 A/us`` in the sequence) needs a fixture that
can set it. The commutation rate at the diode is the rate at which the switch under test turns
on, and that is set by its gate drive: the turn-on gate resistance and the drive voltage. The
block declares which of the two the runner may change and gives the nominal values of the
switch model the runner starts from (:class:`benchrun.runner.didt.DidtModel`,
di/dt = k·(Vdrive − Vth − I/(2·gm))/Rg with k = gm/Ciss)::

    fixture:
      gate_drive:
        # switchable turn-on gate resistors (the pulse generator selects one)
        resistors: [4.7 ohm, 6.8 ohm, 10 ohm, 15 ohm, 22 ohm, 33 ohm]
        drive_voltage: 15 V          # fixed turn-on drive
        threshold_voltage: 4 V       # nominal values of the switch, for the model
        transconductance: 12 S
        input_capacitance: 10 nF

or a drive voltage the pulse generator sets within a range, through one resistor::

      gate_drive:
        resistors: [10 ohm]
        drive_voltage_range: [10 V, 18 V]
        threshold_voltage: 4 V
        transconductance: 12 S
        input_capacitance: 10 nF

The nominal values only seed the model: the runner measures di/dt on trim shots and corrects
the model from them before any graded shot (:mod:`benchrun.runner.didt_trim`).
"""

from __future__ import annotations

from pydantic import Field, model_validator

from benchrun.config.loader import Capacitance, Resistance, StrictModel, Voltage, quantity

Conductance = quantity("conductance")


class GateDriveSpec(StrictModel):
    """Means of setting di/dt (module docstring). All values nominal."""

    resistors: list[Resistance] = Field(min_length=1, max_length=32)
    drive_voltage: Voltage | None = Field(default=None, gt=0)
    drive_voltage_range: tuple[Voltage, Voltage] | None = None
    #: instrument that sets the drive voltage (only the pulse generator is supported)
    drive_set_by: str = "pulse"
    threshold_voltage: Voltage = Field(gt=0)
    transconductance: Conductance = Field(gt=0)
    input_capacitance: Capacitance = Field(gt=0)

    @model_validator(mode="after")
    def _one_way(self) -> GateDriveSpec:
        if any(r <= 0 for r in self.resistors):
            raise ValueError("every gate resistor must be positive")
        if len(set(self.resistors)) != len(self.resistors):
            raise ValueError("a gate resistor is listed twice")
        if self.drive_voltage_range is not None:
            low, high = self.drive_voltage_range
            if not 0 < low < high:
                raise ValueError("drive_voltage_range must be [low, high] with 0 < low < high")
            if len(self.resistors) != 1:
                raise ValueError("a drive_voltage_range sets di/dt through one gate resistor: "
                                 "list exactly one in 'resistors'")
            if self.drive_voltage is not None:
                raise ValueError("give 'drive_voltage' (fixed) or 'drive_voltage_range', "
                                 "not both")
            if self.drive_set_by != "pulse":
                raise ValueError("drive_set_by: only 'pulse' (the pulse generator's drive "
                                 "voltage setting) is supported")
            if high <= self.threshold_voltage:
                raise ValueError("the drive voltage range lies below the threshold voltage")
        else:
            if self.drive_voltage is None:
                raise ValueError("give the fixed 'drive_voltage' of the switchable resistors "
                                 "(or a 'drive_voltage_range')")
            if self.drive_voltage <= self.threshold_voltage:
                raise ValueError("drive_voltage must be above threshold_voltage")
        return self

    @property
    def sets_drive_voltage(self) -> bool:
        """True when di/dt is set by the drive voltage (one resistor), else by resistors."""
        return self.drive_voltage_range is not None

    @property
    def model_k(self) -> float:
        """Nominal k = gm/Ciss of the di/dt model, A/(V·s)·Ω."""
        return self.transconductance / self.input_capacitance

    def describe(self) -> str:
        """One line for logs and run.json: how di/dt is set."""
        ohms = ", ".join(f"{r:g}" for r in self.resistors)
        if self.sets_drive_voltage:
            low, high = self.drive_voltage_range  # type: ignore[misc]
            return (f"drive voltage {low:g}..{high:g} V through {ohms} ohm "
                    f"(set by the {self.drive_set_by} instrument)")
        return f"switchable gate resistors {ohms} ohm at {self.drive_voltage:g} V drive"
