"""The simulated bench: circuit, device models, SCPI instruments and servers (benchseq.sim)."""
