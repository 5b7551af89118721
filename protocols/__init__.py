"""Example protocols and their invented demo runs, shipped as package data.

Installed as ``guardband.protocols``; ``guardband demo`` reads them from here.
"""
