"""Personal data in captions (curate.pii), checked against standards' worked examples and reference libraries."""
from __future__ import annotations

import re

import phonenumbers
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from stdnum import isbn, luhn
from stdnum.iso7064 import mod_97_10

from curate.pii import KINDS, PiiHit, find_pii, is_card_number, is_iban, mask, redact

# Regions whose example numbers the tests use: several numbering plans and national formats.
REGIONS = ["US", "GB", "DE", "FR", "IN", "JP", "BR", "AU"]
# A wide set of default regions makes the negatives meaningful: every region is one more
# national format that could mistake a year, a price or a date for a number.
WIDE = ("US", "GB", "DE", "FR", "IN")


def kinds_of(text: str, regions=()) -> set[str]:
    return {h.kind for h in find_pii(text, KINDS, regions)}


# ---- cards: Luhn check of ISO/IEC 7812-1 -----------------------------------------------------


def test_luhn_worked_examples():
    # ISO/IEC 7812-1 Luhn check: 79927398713 is valid (check digit 3 for 7992739871); stdnum.luhn
    # is the check is_card_number relies on.
    assert luhn.is_valid("79927398713")
    assert not any(luhn.is_valid("7992739871" + str(d)) for d in range(10) if d != 3)
    # 11 digits pass Luhn but are too short for a payment card (13-19 digits, common practice).
    assert not is_card_number("79927398713")
    assert is_card_number("4111111111111111") and not is_card_number("4111111111111112")


def test_luhn_catches_every_single_digit_change():
    # ISO/IEC 7812-1: the Luhn check detects any single-digit error; 4111111111111111 is valid.
    good = "4111111111111111"
    for i in range(len(good)):
        for d in "0123456789":
            if d != good[i]:
                assert not is_card_number(good[:i] + d + good[i + 1:]), (i, d)


@pytest.mark.parametrize("text", ["4111 1111 1111 1111", "4111-1111-1111-1111", "4111111111111111"])
def test_card_found_in_its_printed_groupings(text):
    # 4111111111111111 is Luhn-valid (ISO/IEC 7812-1); groups of four are how cards print it.
    hits = find_pii(f"paid with {text}, thanks", KINDS, WIDE)
    assert [(h.kind, h.text) for h in hits] == [("card", text)]


def test_card_followed_by_more_digits_is_still_found():
    # 4111111111111111 is Luhn-valid (ISO/IEC 7812-1); the trailing "123" is not part of it.
    hits = find_pii("card 4111 1111 1111 1111 123 on file", ["card"])
    assert [h.text for h in hits] == ["4111 1111 1111 1111"]


# ---- IBAN: ISO 13616 with MOD 97-10 of ISO/IEC 7064 -------------------------------------------


def test_iban_worked_examples():
    # ISO 13616 / ISO/IEC 7064 MOD 97-10 worked examples; change the last digit and they fail.
    for good in ("GB82 WEST 1234 5698 7654 32", "DE89 3704 0044 0532 0130 00"):
        assert is_iban(good) and is_iban(good.replace(" ", ""))
        for d in "0123456789":
            if d != good[-1]:
                assert not is_iban(good[:-1] + d)


@pytest.mark.parametrize("iban", ["GB82 WEST 1234 5698 7654 32", "DE89 3704 0044 0532 0130 00",
                                  "GB82WEST12345698765432", "DE89370400440532013000"])
def test_iban_found_with_or_without_spaces(iban):
    # ISO 13616 worked examples, in the paper format (groups of four) and the electronic one.
    for text in (f"transfer to {iban}", f"transfer to {iban} OK thanks", f"IBAN: {iban}."):
        hits = find_pii(text, KINDS, WIDE)
        assert [(h.kind, h.text) for h in hits] == [("iban", iban)], text


def test_iban_with_a_wrong_last_digit_is_not_found():
    # ISO 13616 worked example with its last digit changed: the MOD 97-10 check fails.
    assert kinds_of("transfer to GB82 WEST 1234 5698 7654 33", WIDE) == set()


def test_iban_digit_groups_are_not_phone_numbers():
    # DE89 3704 0044 0532 0130 00 (ISO 13616 example): with Germany as a default region its
    # digit groups would read as a German number; the IBAN takes them.
    assert kinds_of("pay DE89 3704 0044 0532 0130 00 now", ("DE",)) == {"iban"}
    assert kinds_of("paid with 4111 1111 1111 1111", WIDE) == {"card"}


# ---- phone numbers: phonenumbers' own example numbers are the reference ----------------------


@pytest.mark.parametrize("region", REGIONS)
def test_example_numbers_in_international_format_are_found_without_regions(region):
    # phonenumbers.example_number(region): the library's example fixed-line number.
    number = phonenumbers.example_number(region)
    for fmt in (phonenumbers.PhoneNumberFormat.INTERNATIONAL, phonenumbers.PhoneNumberFormat.E164):
        written = phonenumbers.format_number(number, fmt)
        hits = find_pii(f"ring {written} after six", KINDS)
        assert [(h.kind, h.text) for h in hits] == [("phone", written)], written


@pytest.mark.parametrize("region", REGIONS)
def test_national_numbers_need_their_region(region):
    # phonenumbers.example_number(region) written the national way (no country code).
    number = phonenumbers.example_number(region)
    written = phonenumbers.format_number(number, phonenumbers.PhoneNumberFormat.NATIONAL)
    text = f"ring {written} after six"
    assert [h.text for h in find_pii(text, ["phone"], [region])] == [written]
    assert find_pii(text, ["phone"]) == []  # no default region: only +CC numbers count


@pytest.mark.parametrize("region", ["US", "GB", "DE", "IN"])
def test_mobile_example_numbers(region):
    # phonenumbers.example_number_for_type(region, MOBILE): the library's example mobile number.
    number = phonenumbers.example_number_for_type(region, phonenumbers.PhoneNumberType.MOBILE)
    written = phonenumbers.format_number(number, phonenumbers.PhoneNumberFormat.INTERNATIONAL)
    assert [h.kind for h in find_pii(f"text me on {written}", KINDS)] == ["phone"]


@pytest.mark.parametrize("template", ["(X {n} ", "call {n}  4000 0000", "{n}/{n}", "tel:{n}."])
def test_plus_numbers_among_other_text(template):
    # phonenumbers.example_number("US") in international format, next to text that a matcher
    # could read as part of the number.
    written = phonenumbers.format_number(phonenumbers.example_number("US"), phonenumbers.PhoneNumberFormat.INTERNATIONAL)
    text = template.format(n=written)
    hits = find_pii(text, KINDS, ("US",))
    assert [h.text for h in hits] == [written] * template.count("{n}"), hits


@pytest.mark.parametrize(
    "text",
    [
        "a 12 cm mug made in 2024, glaze no. 7",  # small numbers and a year
        "years 1999 2000 2001 2002 on the shelf",  # a run of years
        "was $1,299.99, now €45.50 or 3 for 100",  # prices
        "shot on 2024-01-15 and 15/01/2024 at 10:30",  # ISO 8601 and day/month/year dates, a time
        "ISBN 978-3-16-148410-0",  # ISBN-13 (valid per stdnum.isbn, asserted below)
        "call +1 555 555 5555",  # NANP area code 555 is not assigned: phonenumbers calls it invalid
        "call +44 20 7946 095",  # one digit short of a London number
        "paid with 4111 1111 1111 1112",  # Luhn fails: not a card, and not a phone either
        "a blue speckled mug on slate",
    ],
)
def test_negatives(text):
    # The number-shaped strings here are not personal data (common practice); the invalid
    # phone numbers are invalid according to phonenumbers.
    assert kinds_of(text, WIDE) == set()


def test_isbn_in_the_negatives_is_a_real_isbn():
    # python-stdnum confirms the ISBN used above is valid, so the negative is a real ISBN.
    assert isbn.is_valid("978-3-16-148410-0")


@given(st.text(alphabet=st.characters(blacklist_characters="+\uff0b"), max_size=200))
@settings(max_examples=200, deadline=None)
def test_without_regions_only_plus_numbers_are_phones(text):
    # phonenumbers with no default region parses only numbers that carry "+" and a country code.
    assert not any(h.kind == "phone" for h in find_pii(text, ["phone"]))


# ---- e-mail and URLs ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    "text,found",
    [
        ("orders to jo.potter@kilnworks.example please", "jo.potter@kilnworks.example"),
        ("mail: JO+shop@Example.COM.", "JO+shop@Example.COM"),
        ("(jo_potter@mail.kiln-works.co.uk)", "jo_potter@mail.kiln-works.co.uk"),
        ("photo/jo@kilnworks.example", "jo@kilnworks.example"),
        ("jörg@töpferei.example", "jörg@töpferei.example"),  # RFC 6531: Unicode addresses
    ],
)
def test_email(text, found):
    # Address shapes per RFC 5322 sec. 3.4.1 (dot-atom local part) and RFC 6531 (Unicode).
    assert [(h.kind, h.text) for h in find_pii(text, KINDS)] == [("email", found)]


@pytest.mark.parametrize("text", ["a@b", "jo@localhost", "@kilnworks.example", "jo@.example", "jo@kiln..example",
                                  "x" * 65 + "@kilnworks.example"])
def test_not_email(text):
    # No dotted host, an empty part, or a local part over 64 characters (RFC 5321 sec. 4.5.3.1.1).
    assert find_pii(text, ["email"]) == []


@pytest.mark.parametrize(
    "text,found",
    [
        ("see https://kilnworks.example/shop.", "https://kilnworks.example/shop"),
        ("(see www.kilnworks.example/a_(b))", "www.kilnworks.example/a_(b)"),
        ("HTTP://KILN.EXAMPLE/?q=1&r=2, then", "HTTP://KILN.EXAMPLE/?q=1&r=2"),
        ('<a href="https://kiln.example/x">', "https://kiln.example/x"),
    ],
)
def test_url(text, found):
    # RFC 3986 appendix C: white space, quotes and angle brackets delimit URLs in text; trailing
    # sentence punctuation and an unmatched closing bracket are not part of one (common practice).
    assert [(h.kind, h.text) for h in find_pii(text, KINDS)] == [("url", found)]


def test_url_containing_an_email_is_one_hit():
    # RFC 3986 allows "@" in a query; the longer, earlier hit covers the whole value (common practice).
    hits = find_pii("x https://shop.example/?a=b@c.example y", KINDS)
    assert [h.kind for h in hits] == ["url"]


# ---- redact and mask ---------------------------------------------------------------------------


def test_redact_placeholders():
    # Values from the checks above (RFC 5322 address, phonenumbers-valid GB number, ISO/IEC 7812-1
    # Luhn example, ISO 13616 IBAN example, RFC 3986 URL); one placeholder per kind.
    text = ("jo@kilnworks.example, +44 20 7946 0958, 4111 1111 1111 1111, GB82 WEST 1234 5698 7654 32, "
            "https://kilnworks.example")
    hits = find_pii(text, KINDS)
    assert [h.kind for h in hits] == ["email", "phone", "card", "iban", "url"]
    assert redact(text, hits) == "[email], [phone], [card], [iban], [url]"


def test_redact_checks_its_hits():
    with pytest.raises(ValueError):
        redact("a mug", [PiiHit("email", 0, 5, "a cup")])
    # Overlapping hits merge into one placeholder rather than leaving a piece behind.
    text = "call 0123456789 now"
    assert redact(text, [PiiHit("phone", 5, 12, "0123456"), PiiHit("card", 9, 15, "456789")]) == "call [phone] now"


@pytest.mark.parametrize("value", ["4111 1111 1111 1111", "jo.potter@kilnworks.example", "+44 20 7946 0958",
                                   "GB82 WEST 1234 5698 7654 32"])
def test_mask_shows_the_ends_only(value):
    m = mask(value)
    shown = m.replace("…", "")
    assert "…" in m and value not in m and len(shown) <= 6
    assert value.startswith(m.split("…")[0]) and value.endswith(m.split("…")[1])


@given(st.text(max_size=100))
def test_mask_never_shows_more_than_two_fifths(text):
    shown = mask(text).replace("…", "")
    assert len(shown) <= 2 * len(text.strip()) // 5


# ---- properties --------------------------------------------------------------------------------


def _luhn_number(body: str) -> str:
    # stdnum.luhn computes the ISO/IEC 7812-1 check digit.
    return body + luhn.calc_check_digit(body)


def _gb_iban(account: str) -> str:
    # ISO 13616: check digits from MOD 97-10 (stdnum.iso7064) over BBAN + "GB00".
    bban = "WEST" + account
    return "GB" + mod_97_10.calc_check_digits(bban + "GB") + bban


_values = st.one_of(
    st.tuples(st.just("card"), st.from_regex(r"4[0-9]{14}", fullmatch=True).map(_luhn_number)),
    st.tuples(st.just("iban"), st.from_regex(r"[0-9]{14}", fullmatch=True).map(_gb_iban)),
    st.tuples(st.just("phone"), st.sampled_from(REGIONS).map(lambda r: phonenumbers.format_number(
        phonenumbers.example_number(r), phonenumbers.PhoneNumberFormat.INTERNATIONAL))),
    st.tuples(st.just("email"), st.builds("{}@{}.example".format, st.from_regex(r"[a-z]{1,10}(\.[a-z]{1,5})?", fullmatch=True),
                                          st.from_regex(r"[a-z]{1,12}", fullmatch=True))),
    st.tuples(st.just("url"), st.from_regex(r"https://[a-z]{1,10}\.example/[a-z0-9]{0,8}", fullmatch=True)),
)
# Filler without digits, "@", "+" or "/" cannot itself hold personal data of any kind.
_filler = st.text(alphabet=st.sampled_from(list("abcdefghij klmnoXYZé,;!?()\n")), max_size=40)


@given(st.lists(st.tuples(_filler, _values), min_size=1, max_size=4), _filler)
@settings(max_examples=300, deadline=None)
def test_values_in_filler_are_found_and_redacted(pieces, tail):
    text, planted = "", []
    for filler, (kind, value) in pieces:
        text += filler + " "
        planted.append((kind, len(text), value))
        text += value + " "
    text += tail
    hits = find_pii(text, KINDS, ("GB", "US"))
    for kind, start, value in planted:
        assert any(h.kind == kind and h.start <= start and start + len(value) <= h.end for h in hits), (kind, value)
    out = redact(text, hits)
    # Nothing planted survives: no digits (the filler has none), no "@", no scheme.
    assert not re.search(r"\d|@|https://", out)
    assert find_pii(out, KINDS, ("GB", "US")) == []


@given(st.text(max_size=300), st.sampled_from([(), ("US",), WIDE]))
@settings(max_examples=300, deadline=None)
def test_any_text(text, regions):
    hits = find_pii(text, KINDS, regions)
    assert all(text[h.start:h.end] == h.text and h.kind in KINDS for h in hits)
    assert all(a.end <= b.start for a, b in zip(hits, hits[1:]))  # in order, never overlapping
    out = redact(text, hits)
    assert len(out) == len(text) + sum(len(f"[{h.kind}]") - len(h.text) for h in hits)
    for h in hits:  # each hit's own occurrence is gone
        assert out.count(h.text) < text.count(h.text)


def test_bad_arguments():
    with pytest.raises(ValueError, match="passport"):
        find_pii("x", ["passport"])
    with pytest.raises(ValueError, match="XX"):
        find_pii("x", ["phone"], ["XX"])
