"""Every file format absolve reads or writes lives in this package, and only here."""
