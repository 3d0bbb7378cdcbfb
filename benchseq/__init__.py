"""benchseq: unattended supply-ripple rejection sweeps on SCPI instruments or a simulated bench."""

__version__ = "0.1.0"
