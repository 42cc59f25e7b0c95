"""bandloom runtime: command line, flow files, wire format, processes and links.

Imports ``bandloom.blocks`` (never the other way round).
"""
