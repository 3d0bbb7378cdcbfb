"""The safety cautions, in one place: shown when a run or a calibration starts on real
instruments, and printed in every lab report. Common practice for mains-powered bench
instruments; they never replace local electrical-safety codes and qualified practice."""

from __future__ import annotations

CODES_FIRST = (
    "These notes do not replace local electrical-safety codes and qualified practice, which "
    "come first."
)
EARTH = (
    "The generator, supply and oscilloscope are mains-powered and their grounds are tied to "
    "protective earth: a ground clip on a node that is not ground is a short circuit. Never "
    "defeat the earth connection."
)
HEAT = "Pass devices, injector op-amps and electronic loads run hot; let them cool before touching."
CHARGE = (
    "Capacitors on the pin and in the injector hold charge after the outputs turn off; "
    "discharge them before handling the boards."
)
LIMITS = (
    "Keep DC plus ripple peak within the device's limits; set over-voltage and current limits "
    "before any output turns on."
)
SHUT_DOWN = (
    "Shut-down order: generator output off, then the electronic load's input, then the DC "
    "supply's output; benchseq does so on every ending, and so should anyone stopping the "
    "bench by hand."
)

# every lab report
SAFETY_CAUTIONS: tuple[str, ...] = (EARTH, HEAT, CHARGE, LIMITS, CODES_FIRST)

# before a calibration on a real bench (the operator moves probes)
PROBE_CAUTION = (
    "De-energise the bench (generator and supply outputs off, pin capacitors discharged) "
    "before moving a probe. Probe ground leads are tied to the scope's protective earth: "
    "clip them only to the circuit's ground, never to a live node. Follow your local "
    "electrical-safety codes and qualified practice for work on live circuits."
)

# when a run starts on real instruments (shown, never asked: runs go on unattended)
RUN_CAUTION: tuple[str, ...] = (
    "This run switches real instruments on and may keep them on unattended. " + CODES_FIRST,
    EARTH,
    "The supply's current limit and over-voltage protection come from the bench file and are "
    "set before any output turns on; check they suit the device. " + LIMITS.split("; ")[0] + ".",
    SHUT_DOWN,
    HEAT,
    CHARGE,
)
