"""DECLARE: the YAML spec read with the line of every key, validated against one key table.

``yamlsource`` (safe YAML with key lines and bounded expansion), ``keys`` (the
table), ``spec`` (load and validate, overrides), ``schema`` (JSON Schema and
the README's key reference), ``variants`` and ``remedies`` (the batch keys'
parsers).
"""
