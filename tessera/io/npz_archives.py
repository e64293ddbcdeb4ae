"""What reading a damaged numpy ``.npz`` archive can raise, in one place.

An ``.npz`` is a zip archive of ``.npy`` members. One flipped or lost byte can fail in the zip
layer (a bad header or CRC-32, a method field turned into an unsupported compression method, a
flag bit that marks a member encrypted), in the deflate stream before its CRC is checked, or in
numpy's parsing of a member's header. Every reader of an ``.npz`` the workflow wrote catches
these and reports the file in one line instead.
"""

import zipfile
import zlib

#: Exceptions that mean "this .npz is truncated or damaged", not a bug in the caller. zipfile
#: raises NotImplementedError for an unknown compression method and RuntimeError for a member
#: marked encrypted (PKWARE APPNOTE: method and flag fields of the local and central headers).
NPZ_READ_ERRORS = (
    ValueError,
    OSError,
    EOFError,
    KeyError,
    RuntimeError,
    NotImplementedError,
    zipfile.BadZipFile,
    zlib.error,
)
