"""What may reach emitted code: checked identifiers, and free text made safe for a comment.

Identifiers are held to one conservative pattern in every language, an ASCII letter then
ASCII letters, digits or underscores, at most 64 characters, and then to each language's
reserved words. The pattern is stricter than some languages need (JAGS and R also allow
dots), so that a name never needs quoting or escaping anywhere. Free text (a prior's name,
its parameter sentence, a digest) only ever reaches code inside a line comment, as one line
of printable ASCII with every comment opener and closer broken up.
"""

from __future__ import annotations

import keyword
import re
import unicodedata

from registry.errors import InputError


def _words(text: str) -> frozenset[str]:
    return frozenset(text.split())


_IDENTIFIER = re.compile(r"[A-Za-z][A-Za-z0-9_]{0,63}")

# Stan Reference Manual, "Reserved names" (recalled from memory), the C++ keywords that older
# compilers refused, and the functions the emitted code calls. Distribution names (beta,
# normal) stay allowed: stanc 2.35 accepts them as variables (checked in the client tests).
_STAN = _words("""
for in while repeat until if then else true false target functions model data parameters
quantities transformed generated profile return break continue print reject fatal_error
int real complex vector simplex unit_vector sum_to_zero_vector ordered positive_ordered
row_vector matrix cholesky_factor_corr cholesky_factor_cov corr_matrix cov_matrix
complex_vector complex_row_vector complex_matrix array tuple void lower upper offset
multiplier var fvar auto export extern static_assert
alignas alignof and and_eq asm bitand bitor bool case catch char char16_t char32_t class
compl const constexpr const_cast decltype default delete do double dynamic_cast enum
explicit float friend goto inline long mutable namespace new noexcept not not_eq nullptr
operator or or_eq private protected public register reinterpret_cast short signed sizeof
static static_cast struct switch template this thread_local throw try typedef typeid
typename union unsigned using virtual volatile wchar_t xor xor_eq
normal_lpdf student_t_lpdf lognormal_lpdf beta_lpdf
gamma_lpdf log log_sum_exp log_mix exp inv_logit tanh
""")

# JAGS User Manual (version 4.3), the BUGS language keywords and the functions and
# distributions written here (recalled from memory).
_JAGS = _words("""
for in model data var T I dnorm dt dlnorm dbeta dgamma dcat exp ilogit logit tanh log
""")

# Python keywords and soft keywords, and the module names the snippets rely on.
_PYTHON = frozenset(keyword.kwlist) | frozenset(keyword.softkwlist) | {"pm", "numpyro", "dist"}

# R Language Definition, "Reserved words", and brms' own argument names in prior().
_R = _words("""
if else repeat while function for next break TRUE FALSE NULL Inf NaN NA NA_integer_ NA_real_
NA_complex_ NA_character_ in prior class coef group resp dpar nlpar lb ub check
""")

RESERVED: dict[str, frozenset[str]] = {
    "stan": _STAN,
    "jags": _JAGS,
    "pymc": _PYTHON,
    "numpyro": _PYTHON,
    "brms": _R,
}


def check_identifier(name: str, language: str) -> str:
    """Return ``name`` if it is safe as an identifier in ``language``, else raise InputError."""
    if not isinstance(name, str) or not _IDENTIFIER.fullmatch(name):
        raise InputError(
            f"parameter name {sanitize(str(name))!r} is not a safe identifier: use an ASCII "
            "letter followed by letters, digits or underscores (at most 64 characters)",
            field="param",
        )
    if name in RESERVED[language]:
        raise InputError(
            f"parameter name {name!r} is reserved in {language}; choose another with --param",
            field="param",
        )
    if language == "stan" and name.endswith("__"):
        raise InputError(
            f"parameter name {name!r} ends in '__', which Stan reserves; choose another",
            field="param",
        )
    return name


# Comment openers and closers of the languages written here (C-style blocks in Stan, R's and
# Python's strings are irrelevant inside a line comment, but a stray one reads badly).
_COMMENT_MARKS = ("/*", "*/")
# PEP 263: a comment matching this on line 1 or 2 re-declares a Python file's encoding.
_CODING = re.compile(r"coding[:=]", re.IGNORECASE)


def sanitize(text: str, limit: int = 300) -> str:
    """Free text as one line of printable ASCII that cannot end or re-open a comment.

    NFKD decomposition keeps accented letters readable (é -> e); any other non-ASCII
    character, and every control or line-breaking character, becomes a space or '?'.
    """
    ascii_text = "".join(
        ch if ch.isascii() else ("" if unicodedata.combining(ch) else "?")
        for ch in unicodedata.normalize("NFKD", text)
    )
    one_line = " ".join("".join(ch if " " <= ch <= "~" else " " for ch in ascii_text).split())
    changed = True
    while changed:
        changed = False
        for mark in _COMMENT_MARKS:
            if mark in one_line:
                one_line = one_line.replace(mark, f"{mark[0]} {mark[1]}")
                changed = True
    one_line = _CODING.sub(lambda m: m.group(0)[:-1] + " -", one_line)
    return one_line if len(one_line) <= limit else one_line[: limit - 3] + "..."


_SCALE_PREFIX = {"log": "log_", "logit": "logit_", "fisher_z": "z_"}


def default_param(prior_name: str, quantity: str, scale: str, language: str) -> str:
    """The parameter name used when none is given: the quantity (else the prior's name) as
    an identifier, prefixed by its scale (``log_``, ``logit_``, ``z_``) so that the name says
    which scale it is on."""
    base = re.sub(r"[^A-Za-z0-9]+", "_", quantity or prior_name).strip("_").lower()
    prefix = _SCALE_PREFIX.get(scale, "")
    if not base:
        base = "theta"
    if not prefix and not base[0].isalpha():
        base = "theta_" + base
    name = (prefix + base)[:64].rstrip("_")
    try:
        return check_identifier(name, language)
    except InputError as err:
        raise InputError(
            f"{err.message} (derived from the prior; name one with --param)", field="param"
        ) from None


def natural_name(param: str, scale: str, language: str) -> str:
    """The name of the natural-scale transform of ``param``: the name without its scale
    prefix where that leaves a safe identifier, else ``param`` + ``_natural``."""
    prefix = _SCALE_PREFIX.get(scale, "")
    stripped = param[len(prefix) :] if prefix and param.startswith(prefix) else ""
    if stripped[:1].isalpha():
        try:
            return check_identifier(stripped, language)
        except InputError:
            pass
    return check_identifier(f"{param[:56]}_natural", language)
