-- edge_files: the rows of one edge table's Parquet files, as discovery listed them (graphkit/discover.py).
-- grain: one row per input row; every column of the files (by name across files), plus __graphkit_file, the path
--        of the row's file, which joins the hive partition values discovery typed (DuckDB's own reading of the
--        folder names is off, so that the checks and the ingest see one type per partition column).
-- inputs: the files in $files.
-- params: $files (list of absolute paths; written into the text, as the view raw_edges is built on it).
with final as (
    select *
    from read_parquet($files, union_by_name = true, hive_partitioning = false, filename = '__graphkit_file')
)

select * from final
