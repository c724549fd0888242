"""Carrying an algorithm to a port: golden vectors, a C reference and a runner.

:mod:`livedyn.port.kit` writes the folder (``livedyn port-kit``); the C sources it copies live
in ``livedyn/port/c/`` (package data).
"""
