"""Quote files as data: readers, the row-rule language and the rules of each file kind.

Pure: nothing here opens a database. :mod:`calib.inputs.files` reads a CSV or Parquet file in
chunks of rows; :mod:`calib.inputs.rows` is the small language the rules are written in (parse
a column, refuse the rows that fail, with a reason); :mod:`calib.inputs.rules` holds the rules
of futures, options and rates files. What the rules need from the store (the underlying
futures' settlements, the day's discount factors, the previous day's values) is handed in by
the unit of work, :mod:`calib.workflows.ingest`.
"""
