"""Check digits against published worked examples, plus property tests."""

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from formread.form import checkdigits as cd


def test_luhn_published_example():
    # ISO/IEC 7812-1, annex B worked example
    assert cd.luhn_compute("7992739871") == "3"
    assert cd.luhn_valid("79927398713")
    assert not cd.luhn_valid("7992739874")


def test_mod11_2_published_examples():
    # ISO 7064 MOD 11-2 worked examples as widely published for the standard (ISNI/ORCID documentation)
    assert cd.mod11_2_compute("000000021825009") == "7"
    assert cd.mod11_2_compute("000000021694233") == "X"
    assert cd.mod11_2_valid("0000000218250097")
    assert cd.mod11_2_valid("000000021694233X")
    assert cd.mod11_2_valid("000000021694233x")
    assert not cd.mod11_2_valid("0000000218250098")


def test_iban_published_example():
    # ISO 13616 example IBAN
    assert cd.iban_valid("GB82 WEST 1234 5698 7654 32")
    assert not cd.iban_valid("GB82 WEST 1234 5698 7654 33")
    assert not cd.iban_valid("GB82")
    assert not cd.iban_valid("82GB WEST 1234 5698 7654 32")


def test_mod97_10_digits_compute_and_validate():
    # The IBAN example rearranged by hand (WEST -> 32 14 28 29, GB -> 16 11, check 82 last)
    # is the plain ISO 7064 form: the number is 1 mod 97.
    assert cd.mod97_10_valid("3214282912345698765432" + "161182")
    payload = "3214282912345698765432161100"[:-2]
    assert cd.mod97_10_compute(payload) == "82"
    assert not cd.mod97_10_valid("12")


def test_gs1_published_example():
    # GS1's manual check digit calculation example (GTIN-13)
    assert cd.gs1_compute("629104150021") == "3"
    assert cd.gs1_valid("6291041500213")
    assert not cd.gs1_valid("6291041500214")


def test_verhoeff_and_damm_published_examples():
    # Verhoeff: 236 -> 3 and 12345 -> 1 (the algorithm's usual worked examples); Damm: 572 -> 4
    assert cd.verhoeff_compute("236") == "3"
    assert cd.verhoeff_compute("12345") == "1"
    assert cd.verhoeff_valid("2363") and not cd.verhoeff_valid("2364")
    assert cd.damm_compute("572") == "4"
    assert cd.damm_valid("5724") and not cd.damm_valid("5734")


@pytest.mark.parametrize("bad", ["", "12a4", "١٢٣", "-123", " 12", None])
def test_validators_reject_odd_input_without_raising(bad):
    for name, (_compute, valid) in cd.SCHEMES.items():
        assert valid(bad) is False, name
    with pytest.raises(ValueError):
        cd.luhn_compute("12a")


payloads = st.text(alphabet="0123456789", min_size=1, max_size=20)


@settings(max_examples=150, deadline=None)
@given(payloads)
def test_appending_the_computed_check_always_validates(payload):
    for name, (compute, valid) in cd.SCHEMES.items():
        assert valid(payload + compute(payload)), name


@settings(max_examples=150, deadline=None)
@given(payloads, st.data())
def test_single_substitution_is_detected(payload, data):
    for name in ("luhn", "verhoeff", "damm", "mod11-2"):
        compute, valid = cd.SCHEMES[name]
        full = payload + compute(payload)
        digit_positions = [i for i, c in enumerate(full) if c.isdigit()]
        i = data.draw(st.sampled_from(digit_positions))
        new = data.draw(st.sampled_from([d for d in "0123456789" if d != full[i]]))
        assert not valid(full[:i] + new + full[i + 1:]), (name, full, i, new)
