"""The refused list of common passwords (OWASP ASVS 5 V6.2.4: at least the 3,000 most common)."""

from __future__ import annotations

import pytest

from app.workflow import passwords


def test_the_refused_list_holds_at_least_the_3000_most_common_passwords():
    from zxcvbn.frequency_lists import FREQUENCY_LISTS

    ranked = FREQUENCY_LISTS["passwords"]
    assert len(ranked) >= 3000
    refused = passwords.common_passwords()
    assert len(refused) >= 3000
    assert {word.lower() for word in ranked[:3000]} <= refused


@pytest.mark.parametrize("password", [
    "undertaker",   # rank 2,500 in the passwords frequency list of zxcvbn 4.5.0
    "Qwerty1234",   # rank 2,494 there; compared without case
    "digital1",     # rank 2,993 there
])
def test_a_password_deep_in_the_list_is_refused(password):
    problem = passwords.password_problem(password)
    assert problem is not None and "commonly used" in problem


def test_this_services_own_words_are_refused_too():
    assert passwords.password_problem("Plumbline1") is not None
    assert passwords.password_problem("winter2026") is not None


def test_an_uncommon_pass_phrase_is_accepted():
    assert passwords.password_problem("correct horse battery staple") is None


def test_the_list_is_loaded_once():
    assert passwords.common_passwords() is passwords.common_passwords()
