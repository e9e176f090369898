-- Names of the SQL macros installed on this connection (the generator checks it has what it needs).
SELECT DISTINCT function_name FROM duckdb_functions() WHERE function_type = 'macro'
