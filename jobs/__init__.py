"""What a user asks for: the commands of `leadline` and the machinery they share.

- ``cli``: the typer app and the console entry point; lists the command modules;
- ``commands/``: one module per command (parse, validate, call the machinery below, print);
- ``report/``: depth tables (Markdown, CSV, JSON) and plots of a study;
- ``api``: the Python API (the same work as the commands, as functions);
- ``spec``: study specs (TOML); ``sweep``: the depth sweep into a store;
- ``angles``: angle files; ``reference_cache``: the on-disk cache of reference energies;
- ``parsing``: option values into kernel objects; ``paths``: output-file checks and atomic
  writes; ``compute``: where passes run; ``cost``: cost statement and limits;
  ``sparse_ensemble``: what a sparse ensemble may be; ``errors``: InputError;
- ``demo``: `make demo`.

Commands import the machinery, never the other way round.
"""
