-- effects (DESIGN §5): one row per evaluated portfolio, period and class of its universe,
-- with the weights, returns and per-period effects; the columns and their order of the
-- effects table that the local engine writes.
with decomposed as (
    select * from int_effects_decomposed
),

effects as (
    select
        portfolio_id,
        period_end,
        asset_class,
        weight,
        static_weight,
        policy_weight,
        index_return,
        segment_return,
        policy_return,
        static_allocation,
        timing,
        selection,
        interaction,
        is_drifted
    from decomposed
)

select * from effects
