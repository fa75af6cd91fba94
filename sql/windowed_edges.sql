-- windowed_edges: the raw edge rows inside the configured time window.
-- grain: one row per input row whose timestamp lies in [since, until); rows of tables without a timestamp
--        column (ts is null) are always kept.
-- inputs: view raw_edges(src_kind, src, dst_kind, dst, weight, ts, table_path).
-- params: $since, $until (timestamptz, null means open).
with final as (
    select *
    from raw_edges
    where ts is null
       or (($since::timestamptz is null or ts >= $since::timestamptz)
           and ($until::timestamptz is null or ts < $until::timestamptz))
)

select * from final
