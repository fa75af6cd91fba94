-- bad_weights: example rows whose weight cannot be used (null, NaN, infinite, zero or negative).
-- grain: one row per offending edge row, at most 5.
-- inputs: view raw_edges(src, dst, weight).
-- params: none.
with final as (
    select src, dst, weight
    from raw_edges
    where weight is null or isnan(weight) or isinf(weight) or weight <= 0
    limit 5
)

select * from final
