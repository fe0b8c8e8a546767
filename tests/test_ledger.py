"""Ledger grammar: £sd arithmetic, amounts, dates, page balance, misread-rate estimate."""

from __future__ import annotations

import calendar
import datetime as dt
import json
import math
import random
from statistics import NormalDist

import pytest

from ocrbench import synth
from ocrbench.ledger import balance as L
from ocrbench.postprocess.effect import simulate_misreads


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    """The demo generator's ground truth: six pages, two of each currency form."""
    d = tmp_path_factory.mktemp("ledger_archive")
    synth.write_archive(d, synth.ArchiveSpec(n_pages=6))
    pages = {}
    for p in sorted(d.glob("*.txt")):
        meta = json.loads(p.with_suffix(".json").read_text(encoding="utf-8"))["meta"]
        pages[p.stem] = (p.read_text(encoding="utf-8").splitlines(), meta)
    return pages


# --------------------------------------------------------------------------- £sd


def test_pound_is_twenty_shillings_is_240_pence():
    # £1 = 20s = 240d; 1d = 4 farthings (fact of the trade, common practice)
    assert L.lsd_to_farthings(1) == L.lsd_to_farthings(0, 20) == L.lsd_to_farthings(0, 0, 240) == 960
    assert L.lsd_to_farthings(0, 1) == L.lsd_to_farthings(0, 0, 12)
    assert L.farthings_to_lsd(960) == (1, 0, 0, 0)


def test_hand_worked_lsd_addition():
    # Hand-worked: £2 7s 6d + £1 12s 6d = £4 0s 0d (6d + 6d = 1s; 7s + 12s + 1s = £1)
    a = L.parse_amount("£2 7s 6d")
    b = L.parse_amount("£1 12s 6d")
    total = L.parse_amount("£4 0s 0d")
    assert a and b and total and a.form == L.LSD_MARKED
    assert a.value + b.value == total.value
    assert L.format_amount(a.value + b.value, L.LSD_MARKED) == "£4 0s 0d"
    # the same sum in the three-column form, "-" for a zero column (common practice)
    assert L.parse_amount("2 7 6").value + L.parse_amount("1 12 6").value == L.parse_amount("4 - -").value
    assert L.format_amount(a.value + b.value, L.LSD_COLUMNS) == "4 - -"


def test_fractions_of_a_penny():
    # farthing = ¼d, halfpenny = ½d (common practice): 6½d = 26 farthings, £0 0s 8¼d = 33
    assert L.parse_amount("£0 0s 6½d").value == 26
    assert L.parse_amount("£0 0s 8¼d").value == 33
    assert L.parse_amount("- - ¾").value == 3
    assert L.parse_amount("12 7 6½").value == L.lsd_to_farthings(12, 7, 6, 2)


def test_generator_formats_read_back_exactly():
    # The demo generator's own formatters (an independent implementation) against our parser.
    rng = random.Random(7)
    for _ in range(500):
        f = rng.randint(0, 4 * 240 * 5000)
        assert L.parse_amount(synth.format_lsd_marked(f), L.LSD_MARKED).value == f
        assert L.parse_amount(" ".join(synth.format_lsd_columns(f)), L.LSD_COLUMNS).value == f
        c = rng.randint(0, 10**9)
        assert L.parse_amount(synth.format_decimal(c), L.DECIMAL).value == c
        assert L.parse_amount(synth.format_decimal(c, thousands=False), L.DECIMAL).value == c
        assert L.format_amount(f, L.LSD_MARKED) == synth.format_lsd_marked(f)
        assert L.format_amount(c, L.DECIMAL) == synth.format_decimal(c)


# --------------------------------------------------------------------------- amounts


def test_decimal_amounts():
    assert L.parse_amount("1,234.56").value == 123456
    assert L.parse_amount("1234.56").value == 123456
    assert L.parse_amount("0.05").value == 5
    assert L.parse_amount("1.234,56", decimal_mark=",").value == 123456
    for bad in ("1,23.45", "12.5", "12.500", "1,2345.00", "12,50"):
        assert L.parse_amount(bad, L.DECIMAL) is None, bad


@pytest.mark.parametrize("line", [
    "Marrowby & Kettle Cash Book Folio 12", "Date Payee Particulars £ s d", "Date Payee Particulars Amount",
    "rates Q3", "bill No. 482", "wages week 14", "year 1887", "02/01/1890", "1900-01-07", "Jan 9",
    "wages week 12 20 6",     # 20 shillings is not a written shilling figure
    "paid 3 4 12",            # nor is 12 pence
])
def test_headings_dates_and_numbers_are_not_amounts(line):
    for form in L.FORMS:
        assert L.find_amount(line, form) is None, (line, form)


def test_amount_is_the_trailing_field():
    a = L.find_amount("20/12/1890 Dunmere Co. wages week 52 286 17 4", L.LSD_COLUMNS)
    assert (a.text, a.value) == ("286 17 4", L.lsd_to_farthings(286, 17, 4))
    a = L.find_amount("1900-01-07 F. Falford rates Q2 hemp £315 5s 7d", L.LSD_MARKED)
    assert a.text == "£315 5s 7d"
    a = L.find_amount("Jan 16 W. Yarridge bill No. 482 9.60", L.DECIMAL)
    assert (a.text, a.value) == ("9.60", 960)


def test_one_grammar_reads_pounds_written_after_the_number_the_same_everywhere():
    # Hand-worked: 12l. 7s. 6d. is £12 7s 6d = (12*20 + 7)*12 + 6 = 2970 pence = 11,880 farthings.
    from ocrbench.accuracy import normalise
    from ocrbench.ledger import amounts

    line = "To Kettle for coals 12l. 7s. 6d."
    scored = amounts.find_amounts(line)                              # accuracy scoring
    assert [(a.text, a.digits) for a in scored] == [("12l. 7s. 6d.", "12 7 6")]
    norm = normalise.apply(line, "ledger")                           # normalisation
    assert norm.endswith("£12 7s 6d")
    assert [a.digits for a in amounts.find_amounts(norm)] == ["12 7 6"]
    checked = L.find_amount(line, L.LSD_MARKED)                      # the balance check
    assert (checked.text, checked.value) == ("12l. 7s. 6d.", L.lsd_to_farthings(12, 7, 6)) == ("12l. 7s. 6d.", 11880)
    assert L.detect_form([line]) == L.LSD_MARKED
    # and a page written that way adds up: 12l. 7s. 6d. + 3l. 12s. 6d. = 16l. 0s. 0d.
    # (6d + 6d = 1s, 7s + 12s + 1s = £1)
    page = ["Cash Book Folio 3", "Jan 2 To Kettle for coals 12l. 7s. 6d.", "Jan 9 To wages 3l. 12s. 6d.",
            "Total 16l. 0s. 0d."]
    assert L.check_page(page).status == L.BALANCED
    assert L.check_page(page[:3] + ["Total 15l. 0s. 0d."]).difference_text == "-£1 0s 0d"
    # "Jan 12 L." is a date and an initial, never pounds, for all three
    assert amounts.find_amounts("Jan 12 L. Tarnby") == [] and normalise.apply("Jan 12 L. Tarnby", "ledger") == \
        normalise.apply("Jan 12 L. Tarnby", "loose")


def test_balance_reads_the_shared_dashes_and_written_fractions():
    # The dashes and fractions of the one grammar: "–" (en dash) and "1/2" as in amounts.find_amounts.
    assert L.parse_amount("£0 0s 8 1/2d").value == L.parse_amount("£0 0s 8½d").value == 34
    assert L.parse_amount("12 7 6\u00bd").value == L.parse_amount("12 7 61/2").value
    assert L.parse_amount("4 \u2013 \u2014").value == L.parse_amount("4 - -").value == L.lsd_to_farthings(4)


# --------------------------------------------------------------------------- dates


def test_dates_validated_by_datetime():
    # Reference: Python's datetime decides which days exist (31 Feb does not; 1900 is not a leap year).
    for year in (1888, 1890, 1900):
        for month in range(1, 13):
            mon = calendar.month_abbr[month]
            for day in range(1, 32):
                try:
                    expected = dt.date(year, month, day)
                except ValueError:
                    expected = None
                for text in (f"{day} {mon} {year}", f"{day:02d}/{month:02d}/{year}",
                             f"{year}-{month:02d}-{day:02d}"):
                    m = L.parse_date(text)
                    assert (m.date if m else None) == expected, text


def test_thirty_first_of_february_rejected():
    assert L.parse_date("31 Feb 1890") is None
    assert L.parse_date("Feb 31") is None
    m = L.match_date("31 Feb 1890 R. Corstead repairs 8 10 3")
    assert m is not None and not m.valid            # date-shaped, but no such day
    assert L.parse_date("Feb 29") is not None       # no year written: a leap year is allowed
    assert L.parse_date("Jan 9").day == 9 and L.parse_date("Jan 9").year is None


# --------------------------------------------------------------------------- pages


def test_every_demo_page_balances(archive):
    expected_form = {"decimal": L.DECIMAL, "lsd": L.LSD_COLUMNS, "lsd_marked": L.LSD_MARKED}
    for stem, (lines, meta) in archive.items():
        b = L.check_page(lines)
        assert b.status == L.BALANCED, (stem, b.reason, b.difference_text)
        assert b.difference == 0
        assert b.form == expected_form[meta["currency"]]
        kinds = [ln.kind for ln in b.lines]
        # the generator's own line kinds: header, headings, (brought), entries, total
        want = {"header": L.TEXT, "headings": L.TEXT, "brought": L.BROUGHT, "entry": L.ENTRY, "total": L.TOTAL}
        assert kinds == [want[k] for k in meta["kinds"]], stem


def test_total_off_by_one_minor_unit(archive):
    # Replace the total by the generator's own formatting of (total + 1 cent / farthing).
    for stem, (lines, meta) in archive.items():
        b = L.check_page(lines)
        total_line = b.lines[-1]
        value = total_line.amount.value + 1
        if meta["currency"] == "decimal":
            new_amount = synth.format_decimal(value)
            expected = "0.01"
        elif meta["currency"] == "lsd":
            new_amount = " ".join(synth.format_lsd_columns(value))
            expected = "£0 0s 0¼d"
        else:
            new_amount = synth.format_lsd_marked(value)
            expected = "£0 0s 0¼d"
        changed = lines[:-1] + [total_line.text[: total_line.amount.start] + new_amount]
        nb = L.check_page(changed)
        assert (nb.status, nb.difference, nb.difference_text) == (L.UNBALANCED, 1, expected), stem


@pytest.mark.slow
def test_single_altered_digit_is_detected(archive):
    # Every digit of every amount, changed to the next digit, must unbalance the page (or make it unreadable).
    for stem, (lines, _meta) in archive.items():
        b = L.check_page(lines)
        for ln in b.amount_lines:
            digits = [i for i in range(ln.amount.start, ln.amount.end) if ln.text[i].isdigit()]
            for pos in digits:
                ch = ln.text[pos]
                new = str((int(ch) + 1) % 10)
                changed = list(lines)
                changed[ln.line_no] = ln.text[:pos] + new + ln.text[pos + 1:]
                nb = L.check_page(changed)
                assert nb.status != L.BALANCED, (stem, changed[ln.line_no])
                if nb.status == L.UNBALANCED and pos == digits[-1]:
                    # ... and changing it back is among the one-digit fixes the ledger proposes
                    assert L.DigitFix(ln.line_no, pos, new, ch) in L.single_digit_fixes(nb)


def test_not_checkable_reasons(archive):
    lines, _ = archive["page_001"]
    assert L.check_page(lines[:-1]).reason == "no total or carried-forward line"
    assert L.check_page(["Marrowby & Kettle Cash Book Folio 3", "Date Payee"]).reason == "no amounts found"
    garbled = list(lines)
    garbled[3] = garbled[3][:-4] + "O.5"          # an amount misread beyond the grammar
    b = L.check_page(garbled)
    assert b.status == L.NOT_CHECKABLE and "line 4" in b.reason
    assert [ln.line_no for ln in b.unreadable_lines] == [3]
    assert L.check_page([]).status == L.NOT_CHECKABLE


def test_misread_total_label_still_recognised(archive):
    lines, _ = archive["page_001"]
    label = lines[-1].rsplit(" ", 1)
    misread = label[0].replace("o", "0", 1).replace("a", "u", 1) + " " + label[1]
    assert L.check_page(lines[:-1] + [misread]).status == L.BALANCED


# --------------------------------------------------------------------------- accuracy signal


def test_wilson_interval_matches_references():
    # Newcombe (1998), Stat Med 17:857, table I, method 3 (from memory): 81/263 -> 0.2553..0.3662,
    # 15/148 -> 0.0624..0.1605, 0/20 -> 0..0.1611
    for (k, n), (lo, hi) in {(81, 263): (0.2553, 0.3662), (15, 148): (0.0624, 0.1605),
                             (0, 20): (0.0, 0.1611)}.items():
        got = L.wilson_interval(k, n)
        assert got[0] == pytest.approx(lo, abs=6e-5) and got[1] == pytest.approx(hi, abs=6e-5)
    assert L.wilson_interval(0, 0) is None


def test_wilson_interval_matches_scipy():
    import scipy.stats as stats   # reference only (the test extra installs scipy)

    for k, n in [(0, 5), (3, 17), (40, 41), (500, 1000), (7, 7)]:
        ref = stats.binomtest(k, n).proportion_ci(confidence_level=0.9, method="wilson")  # reference: scipy
        got = L.wilson_interval(k, n, level=0.9)
        assert got == pytest.approx((ref.low, ref.high), abs=1e-9)


def _page(status: str, k: int) -> L.PageBalance:
    """A PageBalance with k amount lines, made by checking a real little page."""
    lines = [f"Jan {i + 1} A. Brem sundries 1.00" for i in range(k - 1)]
    total = (k - 1) * 100 + (0 if status == L.BALANCED else 1)
    b = L.check_page(lines + [f"Total {L.format_amount(total, L.DECIMAL)}"])
    assert b.status == status and b.n_amounts == k
    return b


def test_per_amount_rate_closed_form_for_equal_pages():
    # With every page holding k amounts, P(balanced) = (1-p)^k, so the MLE is 1 - share_balanced^(1/k)
    # (algebra on the binomial likelihood), and the all-balanced upper bound solves K*log(1-p) = -z^2/2.
    k = 12
    pages = [_page(L.BALANCED, k)] * 37 + [_page(L.UNBALANCED, k)] * 13
    est = L.estimate_misreads(pages)
    assert est.pages_judged == 50 and est.pages_failed == 13 and est.amounts == 600
    assert est.per_amount_rate == pytest.approx(1 - (37 / 50) ** (1 / k), abs=1e-9)
    assert est.per_amount_low < est.per_amount_rate < est.per_amount_high
    assert est.failed_share == pytest.approx(13 / 50)
    clean = L.estimate_misreads([_page(L.BALANCED, k)] * 20)
    z = NormalDist().inv_cdf(0.975)
    assert clean.per_amount_rate == 0.0 and clean.per_amount_low == 0.0
    assert clean.per_amount_high == pytest.approx(1 - math.exp(-z * z / (2 * 20 * k)), abs=1e-9)
    none = L.estimate_misreads([])
    assert none.per_amount_rate is None and none.failed_share is None


def test_per_amount_rate_recovers_simulated_misreads(archive):
    # Simulation under the stated model: each amount misread (one digit altered) with p = 0.02.
    truth = [lines for lines, _ in archive.values()]
    p_true = 0.02
    sims = []
    for seed in range(40):
        sims += simulate_misreads(truth, rate=p_true, seed=seed)
    est = L.estimate_misreads([L.check_page(lines) for lines, _ in sims])
    assert est.pages_judged == len(sims)
    assert est.per_amount_low <= p_true <= est.per_amount_high
    assert est.per_amount_high - est.per_amount_low < 0.02
