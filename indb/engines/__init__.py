"""The engines indb runs on: one module per backend, the two bases, one table of backends.

=================  ===========================================================================
``base_dialect``   :class:`Dialect`: the one place syntax trees become SQL text; the plan and
                   write-back build trees against it
``base_engine``    :class:`Engine`: connect, execute, describe, fetch small results
``duckdb``         ``DuckDBDialect`` and ``DuckDBEngine`` (the default backend)
``postgres``       ``PostgresDialect`` and ``PostgresEngine`` (psycopg 3)
``spark``          ``SparkDialect`` and ``SparkEngine`` (pyspark, in-process or Spark Connect)
``backends``       the table of backends and the lookups that read it: ``connect``,
                   ``dialect_for``, ``SCORING_DIALECTS``
=================  ===========================================================================

The bases never import a backend, and no backend imports another; the table loads backend
modules by path on first use, so psycopg and pyspark are imported only when asked for. This
package's ``__init__`` imports nothing, so importing one module never loads the others.
"""
