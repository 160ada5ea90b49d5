"""The demonstration: invented lots from a simulated cycler (published open-circuit fits,
a resistance model, a noisy channel), the batch check and the demo station. May import
everything; nothing imports it but the command line and the tests.
"""
