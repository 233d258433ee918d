"""The restriction syntax: each string must build the R, q written out by hand in the test (the
reference is the arithmetic of the linear equation itself), give the same fit as the (R, q)
arrays, and fail with a precise error when it cannot be read or imposed."""

import numpy as np
import pandas as pd
import pytest

import blocksur
import reference as ref

KS = (3, 2, 3)


@pytest.fixture(scope="module")
def eqs():
    data = ref.make_sur_data(91, T=30, ks=KS)
    y, X = data["c"]
    data["c"] = (y, pd.DataFrame(X, columns=["const", "log(price)", "x 2"]))
    return data


@pytest.fixture(scope="module")
def system(eqs):
    return blocksur.EquationSystem(eqs)


def _pos(system):
    return {key: i for i, key in enumerate(system.fit("ols").coef.index)}


def _row(system, terms):
    pos = _pos(system)
    r = np.zeros(sum(KS))
    for key, w in terms.items():
        r[pos[key]] += w
    return r


@pytest.mark.parametrize(
    "text, terms, rhs",
    [
        ("a::x1 = b::x1", {("a", "x1"): 1, ("b", "x1"): -1}, 0.0),
        # 2 a::x1 - b::x1 / 2 = 1
        ("2*a::x1 - b::x1/2 = 1", {("a", "x1"): 2, ("b", "x1"): -0.5}, 1.0),
        # the coefficient's factor after it, and a number without '*'
        ("a::x1*3 + 0.5 b::x1 = -2", {("a", "x1"): 3, ("b", "x1"): 0.5}, -2.0),
        # numbers on both sides: 0.5 + a::x1 = 2 b::x1 - 1  <=>  a::x1 - 2 b::x1 = -1.5
        ("0.5 + a::x1 = b::x1 * 2 - 1", {("a", "x1"): 1, ("b", "x1"): -2}, -1.5),
        # coefficients on both sides collect; a repeated coefficient adds up
        ("a::x2 + a::x2 = c::const - 1e-1", {("a", "x2"): 2, ("c", "const"): -1}, -0.1),
        # leading sign and scientific notation
        ("-a::x0 = 2.5E1 * b::x0", {("a", "x0"): -1, ("b", "x0"): -25}, 0.0),
        # backticks for names that are not identifiers
        ("c::`log(price)` + c::`x 2` = 1", {("c", "log(price)"): 1, ("c", "x 2"): 1}, 1.0),
        ("`c`::`const` = .5", {("c", "const"): 1}, 0.5),
    ],
)
def test_rows_built_from_text(system, text, terms, rhs):
    fit = system.fit("ols", restrictions=text)
    np.testing.assert_allclose(fit.restrictions.r, _row(system, terms)[None, :], rtol=1e-15, atol=0)
    np.testing.assert_allclose(fit.restrictions.q, [rhs], rtol=1e-15, atol=0)
    assert fit.restrictions.texts == (text,)
    # and the fit satisfies it
    np.testing.assert_allclose(fit.restrictions.r @ fit.coef.to_numpy(), fit.restrictions.q, atol=1e-10)


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_text_and_arrays_give_the_same_fit(system, method):
    text = "a::x1 = b::x1; 2*a::x2 - c::`log(price)`/2 = 1"
    R = np.vstack([_row(system, {("a", "x1"): 1, ("b", "x1"): -1}),
                   _row(system, {("a", "x2"): 2, ("c", "log(price)"): -0.5})])
    q = np.array([0.0, 1.0])
    f_text = system.fit(method, restrictions=text)
    f_arr = system.fit(method, restrictions=(R, q))
    f_list = system.fit(method, restrictions=["a::x1 = b::x1", "2*a::x2 - c::`log(price)`/2 = 1"])
    f_lines = system.fit(method, restrictions="a::x1 = b::x1\n  2*a::x2 - c::`log(price)`/2 = 1\n")
    for other in (f_arr, f_list, f_lines):
        np.testing.assert_allclose(other.coef.to_numpy(), f_text.coef.to_numpy(), rtol=1e-13, atol=1e-14)
        np.testing.assert_allclose(other.vcov.to_numpy(), f_text.vcov.to_numpy(), rtol=1e-12, atol=1e-16)
    # scaling a restriction (both sides) changes nothing (same constraint set)
    f_scaled = system.fit(method, restrictions=(R * [[3.0], [-0.25]], q * [3.0, -0.25]))
    np.testing.assert_allclose(f_scaled.coef.to_numpy(), f_text.coef.to_numpy(), rtol=1e-10, atol=1e-13)
    assert f_text.n_restrictions == 2


def _syntax_error(system, text):
    with pytest.raises(blocksur.RestrictionSyntaxError) as info:
        system.fit("ols", restrictions=text)
    err = info.value
    assert isinstance(err, blocksur.RestrictionError) and isinstance(err, ValueError)
    # the message carries the text and a caret under the reported position
    lines = str(err).splitlines()
    assert lines[-2].strip() == err.text
    caret_line = lines[-1]
    text_line = lines[-2]
    assert caret_line.strip() == "^"
    assert caret_line.index("^") - text_line.index(err.text) == err.position
    return err


def test_unknown_equation(system):
    err = _syntax_error(system, "z::x1 = 0")
    assert err.position == 0 and err.text == "z::x1 = 0"
    assert "unknown equation 'z'" in str(err) and "['a', 'b', 'c']" in str(err)


def test_unknown_regressor_lists_valid_ones(system):
    err = _syntax_error(system, "a::x1 = c::price")
    assert err.position == len("a::x1 = c::")
    assert "'price'" in str(err) and "['const', 'log(price)', 'x 2']" in str(err)
    err = _syntax_error(system, "a::x9 = 0")
    assert "['x0', 'x1', 'x2']" in str(err)


def test_missing_equals_sign(system):
    err = _syntax_error(system, "a::x1 + b::x1")
    assert err.position == len("a::x1 + b::x1") and "'='" in str(err)
    err = _syntax_error(system, "a::x1 b::x1")
    assert err.position == 6


def test_trailing_garbage(system):
    err = _syntax_error(system, "a::x1 = b::x1 c")
    assert err.position == 14 and "'c'" in str(err)
    err = _syntax_error(system, "a::x1 = b::x1 = 0")
    assert err.position == 14


def test_names_needing_backticks(system):
    err = _syntax_error(system, "c::log(price) = 1")
    assert err.position == len("c::log")
    err = _syntax_error(system, "c::`log(price = 1")  # unclosed backtick
    assert err.position == len("c::") and "not closed" in str(err)


@pytest.mark.parametrize(
    "typed, written",
    [
        ("a.x1 = b.x1", "a::x1 = b::x1"),
        ("2*a.x2 - c.`log(price)`/2 = 1", "2*a::x2 - c::`log(price)`/2 = 1"),
        ("a . x1 = 0.5", "a :: x1 = 0.5"),  # numbers keep their decimal point
        # the whole string as typed, also the restrictions after the one that fails
        ("a.x1 = b.x1; `c`.`x 2` + 1e-1 = 2.5 * a.x0", "a::x1 = b::x1; `c`::`x 2` + 1e-1 = 2.5 * a::x0"),
        # the new form mixed with the old: only the old is rewritten
        ("a::x1 = 0; b.x1 = 0", "a::x1 = 0; b::x1 = 0"),
    ],
)
def test_the_dot_form_says_how_to_write_it(system, typed, written):
    """equation.regressor was the syntax of development builds: refused with a message that
    shows what was typed rewritten with '::' (the reference is the rewriting done by hand in
    the parameters), and that rewriting parses."""
    err = _syntax_error(system, typed)
    assert repr(written) in str(err), str(err)
    assert err.text[err.position] == "." and "equation::regressor" in str(err)
    assert system.fit("ols", restrictions=written).n_restrictions == written.count("=")


def test_the_dot_form_in_a_list_shows_its_own_string(system):
    err = _syntax_error(system, ["a::x1 = 0", "b.x1 = c.x1"])
    assert err.text == "b.x1 = c.x1" and "'b::x1 = c::x1'" in str(err)


def test_quoting_names_with_spaces_and_symbols():
    """Names that are not identifiers go between backticks, a backtick inside written twice:
    each restriction must build the row written out by hand."""
    rng = np.random.default_rng(5)
    t = 40
    names = {"north zone": ["const", "log(price)", "a::b"], "south-2": ["const", "x`y", "2nd"]}
    eqs = {}
    for name, regs in names.items():
        x = np.column_stack([np.ones(t)] + [rng.standard_normal(t) for _ in regs[1:]])
        eqs[name] = (x @ np.ones(len(regs)) + rng.standard_normal(t), x)
    system = blocksur.EquationSystem(eqs, regressor_names=names)
    # coefficient order: north zone (const, log(price), a::b), south-2 (const, x`y, 2nd)
    cases = [
        ("`north zone`::`log(price)` = `south-2`::`x``y`", [0, 1, 0, 0, -1, 0], 0.0),
        ("2 * `north zone`::`a::b` - `south-2`::`2nd` / 4 = 1", [0, 0, 2, 0, 0, -0.25], 1.0),
        ("`north zone`::const + `south-2`::`const` = 0", [1, 0, 0, 1, 0, 0], 0.0),
    ]
    for text, row, rhs in cases:
        fit = system.fit("ols", restrictions=text)
        np.testing.assert_array_equal(fit.restrictions.r, [row])
        np.testing.assert_array_equal(fit.restrictions.q, [rhs])
    # unquoted, such names do not parse; a single backtick inside a quoted name ends it
    for text in ("north zone::const = 0", "`north zone`::log(price) = 0", "`south-2`::`x`y` = 0",
                 "`north zone`::a::b = 0"):
        with pytest.raises(blocksur.RestrictionSyntaxError):
            system.fit("ols", restrictions=text)
    # how blocksur writes these names itself (the names in its warnings)
    from blocksur._restrictions import coefficient_text

    assert coefficient_text("north zone", "a::b") == "`north zone`::`a::b`"
    assert coefficient_text("south-2", "x`y") == "`south-2`::`x``y`"
    assert coefficient_text("south_2", "x2") == "south_2::x2"


def test_no_coefficient(system):
    for text in ("1 = 2", "a::x1 - a::x1 = 0", "0*a::x1 = 3"):
        err = _syntax_error(system, text)
        assert "no coefficient" in str(err)


def test_other_syntax_errors(system):
    err = _syntax_error(system, "a = 1")  # missing '::regressor'
    assert err.position == 2 and "expected '::' after equation name 'a'" in str(err)
    assert _syntax_error(system, "a::x1/0 = 1").position == 6  # division by zero
    assert "division by zero" in str(_syntax_error(system, "a::x1/0 = 1"))
    assert _syntax_error(system, "a::x1 == 1").position == 7
    # one colon instead of two
    err = _syntax_error(system, "a:x1 = 0")
    assert err.position == 1 and "two colons" in str(err)
    err = _syntax_error(system, "a: :x1 = 0")  # something between the colons is pointed at
    assert err.position == 2 and "inside '::'" in str(err)
    assert _syntax_error(system, "a::x1 = ").position == len("a::x1 =")


def test_empty(system):
    for spec in ("", "   ", ";\n;", []):
        with pytest.raises(blocksur.RestrictionError, match="no restrictions"):
            system.fit("ols", restrictions=spec)


def test_redundant_restriction_reports_index(system):
    for method in ("ols", "fgls"):
        with pytest.raises(blocksur.RestrictionError) as info:
            system.fit(method, restrictions="a::x1 = b::x1; a::x2 = 0; 2*a::x1 - 2*b::x1 = 0")
        assert not isinstance(info.value, blocksur.RestrictionSyntaxError)
        assert info.value.index == 2
        assert "redundant" in str(info.value) and "2*a::x1 - 2*b::x1 = 0" in str(info.value)
    # the same with arrays: rows 0 and 1 are repeated
    R = np.vstack([_row(system, {("a", "x1"): 1})] * 2)
    with pytest.raises(blocksur.RestrictionError) as info:
        system.fit("ols", restrictions=(R, np.array([1.0, 1.0])))
    assert info.value.index == 1


def test_inconsistent_restriction_reports_index(system):
    with pytest.raises(blocksur.RestrictionError) as info:
        system.fit("fgls", restrictions=["a::x0 = 1", "a::x1 = b::x1", "a::x1 - b::x1 = 2"])
    assert info.value.index == 2
    assert "inconsistent" in str(info.value)
    R = np.vstack([_row(system, {("a", "x1"): 1})] * 2)
    with pytest.raises(blocksur.RestrictionError) as info:
        system.fit("ols", restrictions=(R, np.array([1.0, 2.0])))
    assert info.value.index == 1 and "inconsistent" in str(info.value)


def test_bad_arrays(system):
    with pytest.raises(blocksur.RestrictionError):
        system.fit("ols", restrictions=(np.ones((1, 5)), np.zeros(1)))  # wrong width
    with pytest.raises(blocksur.RestrictionError):
        system.fit("ols", restrictions=(np.ones((2, sum(KS))), np.zeros(3)))  # q length
