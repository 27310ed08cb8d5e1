"""pytest set-up shared by every test folder.

The test folders mirror the package (tests/data, tests/models, ...).  The shared generators
(``realistic_maps``, ``data_helpers``, ``coherent_loops``, ``sbc_tools``, ``tmm_reference``,
``table_coverage``) live in this folder, which pytest puts on ``sys.path`` because this file is
here (rootdir-relative imports, no ``__init__.py``).
"""
