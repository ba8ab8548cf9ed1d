"""Intake: reading roster and mapping files, finding column roles, validating rows, importing all-or-nothing.

Modules here turn a file an analyst brings into stored records (through :mod:`app.store`) or into a parsed
mapping; they know nothing of models, pages or exports. New file formats, header finding, date readings,
intake profiles and roster refreshes belong here.
"""
