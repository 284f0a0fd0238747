-- series (DESIGN §5): one row per evaluated portfolio and period: the returns, the effects
-- summed over classes, and every return and effect linked from the first period through
-- this one (cum_*); the columns and their order of the series table of the local engine.
with linked as (
    select * from int_periods_linked
),

series as (
    select
        portfolio_id,
        period_end,
        period_start,
        return_source,
        portfolio_return,
        computed_return,
        policy_return,
        active_return,
        static_allocation,
        timing,
        selection,
        interaction,
        residual,
        is_drifted,
        cum_portfolio_return,
        cum_policy_return,
        cum_active_return,
        cum_static_allocation,
        cum_timing,
        cum_selection,
        cum_interaction,
        cum_residual
    from linked
)

select * from series
