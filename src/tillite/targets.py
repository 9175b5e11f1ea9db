"""Engine targets: every SQL difference between engines, one class per engine or dialect.

sqlgen builds one tree per statement; where engines differ (floor, finiteness,
row hash, TABLESAMPLE, scan fence, quantiles, sums, row locks, transactions,
comments) it asks the statement's ``Target``.  ``DuckDB``, ``PostgreSQL`` and
``Spark`` are the engines tillite runs on; the others are render-only targets
for ``tillite sql --dialect``.  Any other sqlglot dialect gets the plain
``Target``, whose forms are standard SQL.  Adding an engine is adding one class
here (and one in engines.py).

This module imports sqlglot and the standard library only; the numbers it
needs in SQL come from sqlgen as literals (sqlgen owns their exact text).
"""

from __future__ import annotations

from typing import Sequence

from sqlglot import exp

__all__ = [
    "Target",
    "DuckDB",
    "PostgreSQL",
    "SparkFamily",
    "Spark",
    "Databricks",
    "Trino",
    "BigQuery",
    "Snowflake",
    "TARGETS",
    "target_for",
]

#: The literal texts sqlgen.num gives 0, 1.0 and 0.0 (exponent form, read as DOUBLE).
_ZERO = "0"
_ONE_DOUBLE = "1.0e+00"
_ZERO_DOUBLE = "0.0e+00"

#: Rank accuracy asked of Spark's percentile_approx: its documented relative rank error is 1 / accuracy.
SPARK_QUANTILE_ACCURACY = 10_000

#: Spark SQL reads files in place as ``format.`path```; CSV has no header there.
SPARK_FILE_FORMATS = {"read_parquet": "parquet", "read_json_auto": "json"}

#: DuckDB's file readers, the calls sqlgen.Source puts in FROM for files read in place.
FILE_READER_CALLS = ("read_parquet", "read_csv_auto", "read_json_auto")


def _quoted(name: str) -> exp.Column:
    return exp.column(name, quoted=True)


class Target:
    """Standard SQL: the forms every dialect without a class of its own gets (render-only)."""

    #: The sqlglot dialect the trees are rendered in.
    name: str = ""
    #: TABLESAMPLE takes REPEATABLE (seed) and repeats the sample with it.
    repeatable_sample: bool = False
    #: What a seeded profile sample guarantees here (stated in the model's params).
    sample_repeats: str = "no"
    #: The TABLESAMPLE method the profile tries first (SYSTEM reads blocks, cheaper, may come back short).
    first_sample_method: str = "SYSTEM"
    #: Base tables take the two-stage seeded block sample (sqlgen.block_sample_statement), which
    #: repeats when one thread runs it.
    block_sample: bool = False
    #: information_schema.schemata lists the schemas (a label's --into schema is checked there first).
    lists_schemata: bool = False
    #: Schema names resolve case-insensitively, an attached database's name counting as one (DuckDB).
    folds_schema_names: bool = False
    #: A quoted identifier matches a name of another case (DuckDB; Spark with its default
    #: spark.sql.caseSensitive=false).  tillite quotes every name, so this is how its SQL resolves them.
    quoted_names_ignore_case: bool = False
    #: An unquoted identifier is folded to lower case before it is looked up (PostgreSQL).
    folds_unquoted_to_lower: bool = False
    #: The function giving a value's 1-based position in an array literal (None: a CASE instead).
    array_position_function: str | None = None
    #: ``values[i]`` picks an array literal's entry (1-based).
    subscripts_arrays: bool = False
    #: Multi-statement transactions (a summary store needs them).
    transactions: bool = True
    #: The fingerprints row_hash builds are exact when summed; False: refused by name.
    hashes_rows: bool = False

    def __init__(self, name: str | None = None) -> None:
        if name is not None:
            self.name = name

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.name!r})"

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Target) and type(other) is type(self) and other.name == self.name

    def __hash__(self) -> int:
        return hash((type(self), self.name))

    # ------------------------------------------------------------------ names

    def same_name(self, quoted: str, actual: str) -> bool:
        """Whether the quoted identifier ``quoted`` names the column or table ``actual`` here."""
        return quoted == actual or self.quoted_names_ignore_case and quoted.casefold() == actual.casefold()

    def resolve_name(self, given: str, names: Sequence[str], typed: bool = True) -> str | None:
        """The one of ``names`` (a table's columns, a schema's tables) that ``given`` names, as the engine
        resolves it, or None (none, or several that differ only in case).

        ``typed``: ``given`` was typed by a person as an unquoted name (an option's value), so it is also
        read as the engine reads an unquoted name (PostgreSQL folds it to lower case); an exact match
        always wins.  Without ``typed`` (a name from a model file, quoted in the SQL) only the quoted form.
        """
        if given in names:
            return given
        found = {n for n in names if self.same_name(given, n)}
        if not found and typed and self.folds_unquoted_to_lower and given.lower() in names:
            return given.lower()
        return found.pop() if len(found) == 1 else None

    # ------------------------------------------------------------------ expressions

    def floor(self, e: exp.Expression) -> exp.Expression:
        """floor(e) as a DOUBLE, exact for every double."""
        return exp.Floor(this=e)

    def is_finite(self, e: exp.Expression) -> exp.Expression:
        """True for a finite number, False for NaN/Inf, NULL for NULL."""
        # x - x is NaN for NaN and +-Inf, and NaN = 0 is false in every engine we target.
        return exp.EQ(this=exp.Paren(this=exp.Sub(this=e, expression=e.copy())), expression=exp.Literal.number(_ZERO))

    def float_sum(self, e: exp.Expression) -> exp.Expression:
        """Sum of doubles."""
        return exp.Sum(this=e)

    def row_hash(self, columns: Sequence[exp.Column], row_text: exp.Expression) -> exp.Expression:
        """A 64-bit hash of a row whose SUM is exact here; ``row_text`` is the row as one text (sqlgen.row_text)."""
        built = ", ".join(t.name for t in TARGETS if t.hashes_rows)
        raise NotImplementedError(f"partition fingerprints are not built for the {self.name} dialect; built for {built}")

    def table_sample(
        self, percent: exp.Expression, plain_percent: exp.Expression, method: str, seed: exp.Expression | None
    ) -> exp.TableSample:
        """TABLESAMPLE METHOD (percent) [REPEATABLE (seed) where ``repeatable_sample``].

        ``percent`` in exponent form, ``plain_percent`` as a plain decimal (sqlgen builds both).
        """
        repeat = {"seed": seed} if seed is not None and self.repeatable_sample else {}
        return exp.TableSample(method=exp.var(method), percent=percent, **repeat)

    def seeded_sample_filter(self, seed: exp.Expression, fraction: exp.Expression) -> exp.Expression | None:
        """A per-row filter standing for a seeded TABLESAMPLE, where the dialect's TABLESAMPLE cannot take a seed."""
        return None

    def seeds_quartile_sample(self) -> bool:
        """Whether the report's quartile sample says REPEATABLE (seed)."""
        return True

    def scan_fence(self, select: exp.Select) -> exp.Select:
        """The subquery computed once per row where the planner would inline it; as it is elsewhere."""
        return select

    def quantile(self, e: exp.Expression, fraction: exp.Expression) -> exp.Expression:
        """The engine's own approximate quantile of e at ``fraction`` (a plain decimal literal)."""
        return exp.ApproxQuantile(this=e, quantile=fraction)

    def quartiles_as_list(self, e: exp.Expression, fractions: Sequence[exp.Expression]) -> exp.Expression | None:
        """All quartiles of e in one call returning a list, where the engine has one (one sort per column)."""
        return None

    def pairwise_nearest(self, fenced: bool) -> bool:
        """Whether the pairwise CASE (rather than LEAST) was measured to pay here (sqlgen.pairwise_pays)."""
        return False

    # ------------------------------------------------------------------ statements

    def lock_rows(self, select: exp.Select) -> exp.Select:
        """The select locking its rows until the transaction ends, where the engine has row locks."""
        return select

    def mark(self, table: exp.Table, kind: str, text: str) -> exp.Expression:
        """Write ``text`` as the comment of a view or table: COMMENT ON VIEW|TABLE."""
        return exp.Comment(this=table, kind="VIEW" if kind == "view" else "TABLE", expression=exp.Literal.string(text))

    def comment_query(self, table: exp.Table, parts: Sequence[str]) -> exp.Select:
        """SELECT the comment (column ``comment``) of a view or table; no row or NULL when it has none.

        DuckDB's catalog functions, names compared case-insensitively as DuckDB
        resolves them, an unqualified name in current_schema().
        """
        listed = [
            exp.select(_quoted("database_name"), _quoted("schema_name"), exp.alias_(_quoted(name_column), "name", quoted=True), _quoted("comment"))
            .from_(exp.Table(this=exp.Anonymous(this=function, expressions=[])))
            for function, name_column in (("duckdb_views", "view_name"), ("duckdb_tables", "table_name"))
        ]
        relations = exp.union(listed[0], listed[1], distinct=False).subquery("r")

        def same(column: str, value: exp.Expression) -> exp.Expression:
            return exp.EQ(this=exp.Lower(this=_quoted(column)), expression=exp.Lower(this=value))

        schema = exp.Literal.string(parts[-2]) if len(parts) >= 2 else exp.Anonymous(this="current_schema", expressions=[])
        catalog = exp.Literal.string(parts[-3]) if len(parts) >= 3 else exp.Anonymous(this="current_database", expressions=[])
        where = exp.and_(same("name", exp.Literal.string(parts[-1])), same("schema_name", schema), same("database_name", catalog))
        return exp.select(_quoted("comment")).from_(relations).where(where)

    def prepare(self, statement: exp.Expression) -> exp.Expression:
        """The tree as the dialect needs it just before rendering; the same tree when nothing differs."""
        return statement

    def array_position(self, values: exp.Array, e: exp.Expression) -> exp.Expression | None:
        """The 1-based position of ``e`` in ``values``, NULL when absent; None: no such function here
        (sqlgen then compares value by value)."""
        if self.array_position_function is None:
            return None
        return exp.Anonymous(this=self.array_position_function, expressions=[values, e])

    def array_entry(self, values: exp.Array, index: exp.Expression) -> exp.Expression:
        """values[index], counting from 1 (the category lookups of categorical columns); a CASE where
        the dialect has no array subscript."""
        if self.subscripts_arrays:
            return exp.Bracket(this=values, expressions=[index])
        return exp.Case(this=index, ifs=[exp.If(this=exp.Literal.number(i + 1), true=v.copy())
                                         for i, v in enumerate(values.expressions)])


class DuckDB(Target):
    """DuckDB, the default engine."""

    name = "duckdb"
    repeatable_sample = True
    sample_repeats = "yes"
    first_sample_method = "BERNOULLI"
    block_sample = True
    hashes_rows = True
    lists_schemata = True
    folds_schema_names = True
    quoted_names_ignore_case = True
    #: list_position: 0.06 s against 0.14 s for a CASE of 20 comparisons on 2M rows here
    array_position_function = "list_position"
    subscripts_arrays = True

    def is_finite(self, e: exp.Expression) -> exp.Expression:
        return exp.Anonymous(this="isfinite", expressions=[e])

    def float_sum(self, e: exp.Expression) -> exp.Expression:
        """DuckDB's compensated ``fsum``, whose result does not change with the order the threads
        combine their parts in (plain ``sum`` moves in the last bits from run to run, and so would
        the model file).  Measured no slower than ``sum`` here."""
        return exp.Anonymous(this="fsum", expressions=[e])

    def row_hash(self, columns: Sequence[exp.Column], row_text: exp.Expression) -> exp.Expression:
        """hash(c0, c1, ...) (UBIGINT; SUM gives HUGEINT)."""
        return exp.Anonymous(this="hash", expressions=list(columns))

    def quartiles_as_list(self, e: exp.Expression, fractions: Sequence[exp.Expression]) -> exp.Expression | None:
        return exp.func("quantile_cont", e, exp.Array(expressions=list(fractions)))

    def pairwise_nearest(self, fenced: bool) -> bool:
        return True


class PostgreSQL(Target):
    """PostgreSQL through psycopg."""

    name = "postgres"
    repeatable_sample = True
    sample_repeats = "yes"
    hashes_rows = True
    lists_schemata = True
    folds_unquoted_to_lower = True
    array_position_function = "array_position"
    subscripts_arrays = True

    def row_hash(self, columns: Sequence[exp.Column], row_text: exp.Expression) -> exp.Expression:
        """hashtextextended(row text, 0) (BIGINT; SUM gives NUMERIC)."""
        return exp.Anonymous(this="hashtextextended", expressions=[row_text, exp.Literal.number(_ZERO)])

    def scan_fence(self, select: exp.Select) -> exp.Select:
        """``OFFSET 0``: PostgreSQL pulls simple subqueries up into their parent and has no common
        subexpression elimination, so the refine pass's k scores and their LEAST would be recomputed
        in every CASE branch (about 6x slower at k = 6)."""
        return select.offset(exp.Literal.number(_ZERO), copy=False)

    def quantile(self, e: exp.Expression, fraction: exp.Expression) -> exp.Expression:
        """percentile_cont WITHIN GROUP (exact)."""
        return exp.WithinGroup(this=exp.PercentileCont(this=fraction), expression=exp.Order(expressions=[exp.Ordered(this=e)]))

    def pairwise_nearest(self, fenced: bool) -> bool:
        """Only fenced: an unfenced label view inlines the id into every CASE (1.4x slower than LEAST)."""
        return fenced

    def lock_rows(self, select: exp.Select) -> exp.Select:
        """FOR UPDATE NOWAIT: fails at once (SQLSTATE 55P03) while another transaction holds a row."""
        select.set("locks", [exp.Lock(update=True, wait=True)])  # sqlglot: wait=True renders NOWAIT
        return select

    def comment_query(self, table: exp.Table, parts: Sequence[str]) -> exp.Select:
        """obj_description of to_regclass, which resolves the (quoted) name as the server would and
        gives NULL for a missing relation."""
        regclass = exp.Anonymous(this="to_regclass", expressions=[exp.Literal.string(table.sql(dialect=self.name))])
        described = exp.Anonymous(this="obj_description", expressions=[regclass, exp.Literal.string("pg_class")])
        return exp.select(exp.alias_(described, "comment", quoted=True))


class SparkFamily(Target):
    """Dialects that speak Spark SQL (render-only: spark2, hive); Spark and Databricks below."""

    sample_repeats = "for the same input partitioning"
    transactions = False
    quoted_names_ignore_case = True

    def floor(self, e: exp.Expression) -> exp.Expression:
        """Spark's FLOOR returns BIGINT, which overflows (an error under ANSI mode) for far outliers
        and turns NaN into 0; here floor(e) is built from the exact remainder r = e % 1 (sign of e):
        (e - r) - 1 when r < 0, else e - r.  e - r is exact (an integer-valued double) and r is 0
        beyond 2^52."""
        rem = exp.Mod(this=exp.Paren(this=e), expression=exp.Literal.number(_ONE_DOUBLE))
        whole = exp.Sub(this=exp.Paren(this=e.copy()), expression=exp.Paren(this=rem))
        below = exp.LT(this=exp.Paren(this=rem.copy()), expression=exp.Literal.number(_ZERO_DOUBLE))
        minus_one = exp.Sub(this=exp.Paren(this=whole), expression=exp.Literal.number(_ONE_DOUBLE))
        return exp.Case(ifs=[exp.If(this=below, true=minus_one)], default=whole.copy())

    def table_sample(
        self, percent: exp.Expression, plain_percent: exp.Expression, method: str, seed: exp.Expression | None
    ) -> exp.TableSample:
        """Spark SQL's single row-sampling form, ``TABLESAMPLE (p PERCENT)``, whose percentage must be
        a plain decimal (it refuses exponent literals)."""
        return exp.TableSample(percent=plain_percent)

    def seeded_sample_filter(self, seed: exp.Expression, fraction: exp.Expression) -> exp.Expression | None:
        """rand(seed) < fraction: repeatable for the same input partitioning."""
        return exp.LT(this=exp.Rand(this=seed), expression=fraction)

    def seeds_quartile_sample(self) -> bool:
        return False

    def quantile(self, e: exp.Expression, fraction: exp.Expression) -> exp.Expression:
        """percentile_approx with rank accuracy SPARK_QUANTILE_ACCURACY."""
        return exp.ApproxQuantile(this=e, quantile=fraction, accuracy=exp.Literal.number(SPARK_QUANTILE_ACCURACY))

    def _flagged_xxhash64(self, columns: Sequence[exp.Column], row_text: exp.Expression) -> exp.Expression:
        """xxhash64(c0 IS NULL, c0, c1 IS NULL, c1, ...) as DECIMAL(38,0): xxhash64 skips NULL
        arguments, so each column's NULL flag goes in before it."""
        flagged = [e for c in columns for e in (exp.Is(this=c.copy(), expression=exp.Null()), c)]
        return exp.cast(exp.Anonymous(this="xxhash64", expressions=flagged), exp.DataType.build("DECIMAL(38, 0)"))

    def prepare(self, statement: exp.Expression) -> exp.Expression:
        """Files read in place become ``format.`path```."""
        if any(_file_reader_call(t) for t in statement.find_all(exp.Table)):
            return statement.transform(_spark_file_relation)
        return statement

    def array_position(self, values: exp.Array, e: exp.Expression) -> exp.Expression | None:
        """Spark's ``array_position`` gives 0 for a value not in the array: NULLIF makes it NULL."""
        return exp.Nullif(this=exp.Anonymous(this="array_position", expressions=[values, e]), expression=exp.Literal.number(_ZERO))

    def array_entry(self, values: exp.Array, index: exp.Expression) -> exp.Expression:
        """``element_at`` (1-based), which takes an INT index only."""
        return exp.Anonymous(this="element_at", expressions=[values, exp.cast(index, exp.DataType.build("INT"))])


class Spark(SparkFamily):
    """Spark SQL through pyspark."""

    name = "spark"
    hashes_rows = True
    row_hash = SparkFamily._flagged_xxhash64

    def mark(self, table: exp.Table, kind: str, text: str) -> exp.Expression:
        """COMMENT ON TABLE for tables only; a catalog view takes its comment as the table property 'comment'."""
        if kind != "view":
            return super().mark(table, kind, text)
        prop = exp.Property(this=exp.Literal.string("comment"), value=exp.Literal.string(text))
        return exp.Alter(this=table, kind="VIEW", actions=[exp.AlterSet(expressions=[exp.Properties(expressions=[prop])])])


class Databricks(SparkFamily):
    """Databricks SQL (render-only)."""

    name = "databricks"
    hashes_rows = True
    row_hash = SparkFamily._flagged_xxhash64


class Trino(Target):
    """Trino (render-only)."""

    name = "trino"
    hashes_rows = True

    def row_hash(self, columns: Sequence[exp.Column], row_text: exp.Expression) -> exp.Expression:
        """from_big_endian_64(xxhash64(to_utf8(row text))) as DECIMAL(38,0)."""
        digest = exp.Anonymous(this="xxhash64", expressions=[exp.Anonymous(this="to_utf8", expressions=[row_text])])
        return exp.cast(exp.Anonymous(this="from_big_endian_64", expressions=[digest]), exp.DataType.build("DECIMAL(38, 0)"))


class BigQuery(Target):
    """BigQuery (render-only): TABLESAMPLE SYSTEM only."""

    name = "bigquery"
    hashes_rows = True

    def row_hash(self, columns: Sequence[exp.Column], row_text: exp.Expression) -> exp.Expression:
        """farm_fingerprint(to_json_string(STRUCT(c0, c1, ...))) as BIGNUMERIC."""
        as_json = exp.Anonymous(this="TO_JSON_STRING", expressions=[exp.Struct(expressions=list(columns))])
        return exp.cast(exp.Anonymous(this="FARM_FINGERPRINT", expressions=[as_json]), exp.DataType.build("BIGNUMERIC", dialect="bigquery"))

    def table_sample(
        self, percent: exp.Expression, plain_percent: exp.Expression, method: str, seed: exp.Expression | None
    ) -> exp.TableSample:
        return super().table_sample(percent, plain_percent, "SYSTEM", seed)


class Snowflake(Target):
    """Snowflake (render-only)."""

    name = "snowflake"
    hashes_rows = True

    def row_hash(self, columns: Sequence[exp.Column], row_text: exp.Expression) -> exp.Expression:
        """hash(c0, c1, ...) as NUMBER(38,0) (Snowflake's HASH hashes NULL as a value)."""
        return exp.cast(exp.Anonymous(this="hash", expressions=list(columns)), exp.DataType.build("DECIMAL(38, 0)"))


#: One instance per target with a class of its own, in the order error messages list them.
TARGETS: tuple[Target, ...] = (
    DuckDB(), PostgreSQL(), Spark(), Databricks(), Trino(), BigQuery(), Snowflake(),
    SparkFamily("spark2"), SparkFamily("hive"),
)

_BY_NAME = {t.name: t for t in TARGETS}


def target_for(dialect: str | Target) -> Target:
    """The target of a sqlglot dialect name (a Target is returned as it is).

    Dialects without a class of their own get the standard-SQL ``Target``;
    a name sqlglot does not know raises ValueError, one line naming it.
    """
    if isinstance(dialect, Target):
        return dialect
    found = _BY_NAME.get(dialect)
    if found is not None:
        return found
    from sqlglot.dialects.dialect import Dialect

    try:
        Dialect.get_or_raise(dialect)
    except ValueError as err:
        # sqlglot's own line, which suggests a near name ("Unknown dialect 'postgresql'. Did you mean postgres?")
        raise ValueError(str(err).splitlines()[0].replace("Unknown dialect", "unknown SQL dialect", 1)) from None
    return Target(dialect)


def _file_reader_call(node: exp.Expression) -> bool:
    return isinstance(node, exp.Table) and isinstance(node.this, exp.Anonymous) and node.this.name.lower() in FILE_READER_CALLS


def _spark_file_relation(node: exp.Expression) -> exp.Expression:
    """read_parquet('p') -> parquet.`p` (one path or glob; Spark reads folders as well)."""
    if not _file_reader_call(node):
        return node
    reader = node.this.name.lower()
    args = node.this.expressions
    if reader not in SPARK_FILE_FORMATS:
        raise ValueError(f"Spark SQL cannot read {reader} sources in place with their header; convert them to Parquet or register a table")
    if len(args) != 1 or not isinstance(args[0], exp.Literal):
        raise ValueError("Spark SQL reads one path or glob per source, without extra reader options")
    table = exp.Table(this=exp.to_identifier(args[0].name, quoted=True), db=exp.to_identifier(SPARK_FILE_FORMATS[reader]))
    if node.args.get("alias"):
        table.set("alias", node.args["alias"].copy())
    return table
