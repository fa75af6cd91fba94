-- edge_counts: row counts of the raw edge table by what ingest does with them.
-- grain: one row for the whole table.
-- inputs: view raw_edges(src, dst, weight).
-- params: none.
with final as (
    select
        count(*) as n_rows,
        count(*) filter (where src is null or dst is null) as n_null_ids,
        count(*) filter (where src is not null and dst is not null and src = dst) as n_self_loops,
        count(*) filter (where weight is null or isnan(weight) or isinf(weight) or weight <= 0) as n_bad_weights
    from raw_edges
)

select * from final
