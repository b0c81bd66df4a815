"""The shipped model bundle and its card, installed as the package data of ``formread._models`` (formread/store.py)."""
