"""The shipped demo forms, installed as the package data of ``formread._demo_forms`` (formread/store.py)."""
