-- Per portfolio and asset class: the arithmetic sum over periods of each effect, with the
-- average weights. Sums, not linked values: the linked totals per portfolio are in summary.
with effects as (
    select * from effects
),

by_class as (
    select
        portfolio_id,
        asset_class,
        count(*) as n_periods,
        avg(weight) as mean_weight,
        avg(static_weight) as mean_static_weight,
        avg(policy_weight) as mean_policy_weight,
        sum(static_allocation) as static_allocation_sum,
        sum(timing) as timing_sum,
        sum(selection) as selection_sum,
        sum(interaction) as interaction_sum
    from effects
    group by portfolio_id, asset_class
)

select * from by_class
