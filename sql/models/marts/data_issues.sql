-- data_issues (DESIGN §2, §5): every problem found, one row each, with the local engine's
-- codes and severities (README "Data issues"). Whole-input problems have an empty
-- portfolio_id; while any exists only they are listed (the other marts are empty).
-- Portfolio problems: `error` rows skip the portfolio, `warning` rows let it run.
with shared_issues as (
    select * from int_shared_issues_found
),

portfolio_errors as (
    select * from int_portfolio_errors_found
),

orphans as (
    select * from int_orphan_portfolios_found
),

holdings_gaps as (
    select * from int_holdings_gaps_found
),

policy_gaps as (
    select * from int_policy_gaps_found
),

effects as (
    select * from int_effects_decomposed
),

periods as (
    select * from int_periods_totalled
),

shared_count as (
    select count(*) as n_shared_issues
    from shared_issues
),

segment_gaps as (
    select
        portfolio_id,
        period_end,
        asset_class,
        'warning' as severity,
        'segment_return_missing' as code,
        'segment_returns: portfolio ' || portfolio_id || ' has no return for class '
        || asset_class || ' in the period ending ' || cast(period_end as varchar) || ' (weight '
        || case
            when abs(weight) < 1e18
                then cast(cast(weight as decimal(38, 6)) as varchar)
            else 'out of range'
        end
        || '); selection is null there and the index return stands in.' as message
    from effects
    where is_segment_missing
),

reported_gaps as (
    select
        portfolio_id,
        period_end,
        cast(null as varchar) as asset_class,
        'warning' as severity,
        'reported_return_missing' as code,
        'portfolio_returns: portfolio ' || portfolio_id
        || ' has no reported return for the period ending ' || cast(period_end as varchar)
        || '; the computed return is used for it.' as message
    from periods
    where is_reported_missing
),

portfolio_issues as (
    select portfolio_id, period_end, asset_class, severity, code, message from portfolio_errors
    union all
    select portfolio_id, period_end, asset_class, severity, code, message from orphans
    union all
    select portfolio_id, period_end, asset_class, severity, code, message from holdings_gaps
    union all
    select portfolio_id, period_end, asset_class, severity, code, message from policy_gaps
    union all
    select portfolio_id, period_end, asset_class, severity, code, message from segment_gaps
    union all
    select portfolio_id, period_end, asset_class, severity, code, message from reported_gaps
),

data_issues as (
    select portfolio_id, period_end, asset_class, severity, code, message from shared_issues
    union all
    select distinct
        i.portfolio_id,
        i.period_end,
        i.asset_class,
        i.severity,
        i.code,
        i.message
    from portfolio_issues as i
    cross join shared_count as n
    where n.n_shared_issues = 0
)

select * from data_issues
