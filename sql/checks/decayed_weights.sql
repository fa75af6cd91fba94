-- decayed_weights: rows whose weight, halved for every half_life_days of age (as edges.sql does), falls below the
-- smallest positive float32 (1.401298464324817e-45) and so would reach the graph as a zero weight.
-- grain: one row for all tables together: the count, and the age in days of the youngest such row.
-- inputs: table windowed (see windowed_edges.sql), already free of bad weights (checks/bad_weights.sql).
-- params: $as_of (timestamptz: age reference), $half_life_days (double).
with decayed as (
    select
        greatest(epoch($as_of::timestamptz) - epoch(ts), 0) / 86400.0 as age_days,
        weight * pow(0.5, greatest(epoch($as_of::timestamptz) - epoch(ts), 0) / 86400.0
                          / $half_life_days::double) as decayed_weight
    from windowed
    where src is not null and dst is not null and ts is not null
),

final as (
    select count(*) as n_rows, min(age_days) as youngest_age_days
    from decayed
    where decayed_weight < 1.401298464324817e-45
)

select * from final
