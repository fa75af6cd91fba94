-- bad_weights: example rows whose weight cannot be used (null, NaN, infinite, zero or negative, each as the
-- float32 the graph stores: above 3.4028234663852886e38 is infinite, below 1.401298464324817e-45 zero).
-- grain: one row per offending edge row, at most 5.
-- inputs: table windowed (see windowed_edges.sql).
-- params: none.
-- The "offset 0" keeps the filter out of the Parquet scan: pushed down, it prunes row groups by their min/max
-- statistics, which leave NaN out, so a NaN weight counted by checks/edge_counts would have no example row.
with scanned as (
    select table_path, src, dst, weight
    from windowed
    offset 0
),

final as (
    select table_path, src, dst, weight
    from scanned
    where src is not null and dst is not null
      and (weight is null or isnan(weight) or isinf(weight) or weight < 1.401298464324817e-45
           or weight > 3.4028234663852886e38)
    limit 5
)

select * from final
