-- bad_weights: example rows whose weight cannot be used (null, NaN, infinite, zero or negative).
-- grain: one row per offending edge row, at most 5.
-- inputs: table windowed (see windowed_edges.sql).
-- params: none.
with final as (
    select table_path, src, dst, weight
    from windowed
    where src is not null and dst is not null
      and (weight is null or isnan(weight) or isinf(weight) or weight <= 0)
    limit 5
)

select * from final
