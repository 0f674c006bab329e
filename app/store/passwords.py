"""Password hashing (argon2id) and random tokens.

References
----------
Biryukov, Dinu, Khovratovich, Josefsson. "Argon2 Memory-Hard Function for
Password Hashing and Proof-of-Work Applications", RFC 9106 (2021).
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from functools import lru_cache

from argon2 import PasswordHasher
from argon2.exceptions import InvalidHashError, VerificationError, VerifyMismatchError

_HASHER = PasswordHasher()


@lru_cache(maxsize=1)
def _dummy_hash() -> str:
    """Verified against when the user name is unknown, so that a wrong name costs as
    much time as a wrong password (made on first use, not at import)."""
    return _HASHER.hash("rawproof-dummy-password")


def hash_password(password: str) -> str:
    """An argon2id hash string (salt and parameters included)."""
    return _HASHER.hash(password)


def verify_password(stored_hash: str | None, password: str) -> bool:
    """True when ``password`` matches ``stored_hash``; constant work for a missing user."""
    try:
        return _HASHER.verify(stored_hash or _dummy_hash(), password) and stored_hash is not None
    except (VerifyMismatchError, VerificationError, InvalidHashError):
        return False


def new_token(nbytes: int = 32) -> str:
    """A URL-safe random token."""
    return secrets.token_urlsafe(nbytes)


def token_digest(token: str) -> str:
    """The sha256 hex digest under which a session or API token is stored."""
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def same(a: str, b: str) -> bool:
    """Constant-time string comparison."""
    return hmac.compare_digest(a.encode("utf-8"), b.encode("utf-8"))


# ------------------------------------------------------------------ the password policy
#: The shortest password accepted, in characters after normalisation (NIST SP
#: 800-63B 5.1.1.2 asks for at least 8; a shared lab server asks for 12, which a
#: passphrase of three or four words meets).
MIN_LENGTH = 12
#: The longest accepted (the guideline asks verifiers to allow at least 64).
MAX_LENGTH = 256

# Words and strings that head every published list of leaked passwords, recalled
# from memory (no list copied); a password whose core (lower case, look-alike
# digits read as letters, leading and trailing digits and punctuation removed) is
# one of these, or a run or repetition, is refused.
_COMMON = frozenset("""
password passw0rd passwort motdepasse contrasena wachtwoord salasana haslo qwerty
qwertyuiop qwertz azerty asdfgh asdfghjkl zxcvbn zxcvbnm qazwsx qweasd letmein welcome
welcomehome iloveyou loveyou admin administrator root toor changeme default secret
monkey dragon master shadow sunshine princess football baseball basketball soccer
hockey superman batman starwars trustno trustnoone whatever freedom ninja mustang
michael jennifer jordan hunter ranger buster tigger charlie thomas george pepper
cookie summer winter spring autumn flower hello helloworld login access computer
internet google facebook abcdef abcdefgh abcdefghijkl abcabc abc qwe zaq
lovely loveme babygirl killer matrix silver golden diamond cheese chocolate
banana orange purple yellow family friends forever blessed jesus angel
iloveu passpass testtest test tester guest user username changeit temporary
correcthorsebatterystaple mypassword yourpassword newpassword oldpassword
rawproof mri scanner kspace
""".split())

_LOOKALIKE = str.maketrans({"0": "o", "1": "l", "3": "e", "4": "a", "5": "s", "7": "t",
                            "8": "b", "@": "a", "$": "s", "!": "i", "|": "l", "+": "t"})
_KEYBOARD_ROWS = ("1234567890", "qwertyuiop", "asdfghjkl", "zxcvbnm", "abcdefghijklmnopqrstuvwxyz")


def _visible(password: str) -> str:
    """NFKC form with invisible characters dropped and runs of white space made one
    space (SP 800-63B 5.1.1.2 lets verifiers normalise and collapse spaces)."""
    import unicodedata

    text = unicodedata.normalize("NFKC", password)
    kept = "".join(ch for ch in text
                   if unicodedata.category(ch) not in ("Cf", "Cc", "Cs", "Co", "Cn")
                   or ch in "\t\n")
    return " ".join(kept.split()) if kept.strip() else ""


def _core(text: str) -> str:
    """Lower case, look-alikes read as letters, separators and edge digits removed."""
    low = text.casefold()
    stripped = low.strip("0123456789!@#$%^&*()-_=+.,;:?~ ")
    core = (stripped or low).translate(_LOOKALIKE)
    return "".join(ch for ch in core if ch.isalnum())


def _is_run(text: str) -> bool:
    """One character repeated, a short block repeated, or a keyboard or alphabet run."""
    low = text.casefold().replace(" ", "")
    if not low:
        return True
    for size in range(1, min(6, len(low) // 2) + 1):
        if len(low) % size == 0 and low[:size] * (len(low) // size) == low:
            return True
    for row in _KEYBOARD_ROWS:
        for seq in (row, row[::-1]):
            if len(low) >= 4 and low in seq * 3:
                return True
    return False


def password_problem(password: str, *, user_name: str = "") -> str | None:
    """Why ``password`` is refused, or None when it is acceptable.

    Parameters
    ----------
    password : str
        The proposed password, as typed.
    user_name : str
        The account's sign-in name (a context-specific word).

    Returns
    -------
    str or None
        One sentence a person can act on.

    References
    ----------
    NIST Special Publication 800-63B, "Digital Identity Guidelines:
    Authentication and Lifecycle Management", section 5.1.1.2 (Memorized Secret
    Verifiers): length counted in Unicode code points after normalisation, a
    check against commonly used and expected values (dictionary words,
    repetitive or sequential characters, context-specific words such as the
    user name and the service's name), no composition rules.
    """
    password = password or ""
    if len(password) > MAX_LENGTH:
        return f"A password has at most {MAX_LENGTH} characters."
    visible = _visible(password)
    if not visible.strip():
        return "A password cannot be only spaces or invisible characters."
    if len(visible) < MIN_LENGTH:
        return (f"A password needs at least {MIN_LENGTH} characters (spaces and invisible "
                f"characters not counted twice); a few unrelated words make a good one.")
    core = _core(visible)
    name = _core(user_name or "")
    if name and core and (core.replace(name, "") == "" or core == name[::-1]):
        return "A password cannot be the user name."
    if _is_run(visible) or _is_run(core) or _is_run(core.rstrip("0123456789")):
        return "A password cannot be a run of one key, a repeated block or a row of the keyboard."
    if core in _COMMON or any(core == w * 2 for w in _COMMON):
        return "That password is one of the most common ones; choose something less guessable."
    return None
