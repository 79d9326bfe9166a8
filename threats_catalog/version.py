"""Version of the built-in catalogue, in a module of its own: every command that opens a registry compares it
with the registry's copy, and reading it must not load the catalogue."""

#: Bump the minor part when entries are added or retired, the major part when a code's meaning changes (which
#: the code scheme forbids for released codes).
CATALOGUE_VERSION = "1.2.0"
