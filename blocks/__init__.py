"""bandloom block set: DSP kernels (``bandloom.blocks.dsp``) and block adapters.

Layering: ``bandloom.blocks.dsp`` is pure numpy/scipy and imports nothing else
of bandloom; block adapters import the kernels; ``bandloom.runtime`` imports
both. Nothing here imports ``bandloom.runtime`` or ``zmq``.
"""
