-- edge_counts: row counts of the edge tables by what ingest does with them.
-- grain: one row for all tables together.
-- inputs: view raw_edges and table windowed (see windowed_edges.sql).
-- params: none.
-- Weights are bad as the float32 the graph stores (see checks/bad_weights.sql).
with everything as (
    select count(*) as n_rows from raw_edges
),

inside as (
    select
        count(*) as n_inside,
        count(*) filter (where src is null) as n_null_src,
        count(*) filter (where dst is null) as n_null_dst,
        count(*) filter (where src is null or dst is null) as n_null_ids,
        count(*) filter (where src is not null and dst is not null and src_kind = dst_kind and src = dst)
            as n_self_loops,
        count(*) filter (where src is not null and dst is not null
                         and (weight is null or isnan(weight) or isinf(weight) or weight < 1.401298464324817e-45
                              or weight > 3.4028234663852886e38)) as n_bad_weights
    from windowed
),

final as (
    select n_rows, n_rows - n_inside as n_outside_window, n_null_src, n_null_dst, n_null_ids, n_self_loops,
           n_bad_weights
    from everything, inside
)

select * from final
