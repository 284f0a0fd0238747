-- Portfolios named in policy, segment_returns or portfolio_returns but absent from holdings:
-- one `no_holdings` warning each; they are not evaluated and do not count as skipped.
with holdings as (
    select * from stg_holdings
),

policy as (
    select * from stg_policy
),

segment_returns as (
    select * from stg_segment_returns
),

portfolio_returns as (
    select * from stg_portfolio_returns
),

named_elsewhere as (
    select portfolio_id from policy
    union
    select portfolio_id from segment_returns
    union
    select portfolio_id from portfolio_returns
),

held as (
    select distinct portfolio_id
    from holdings
    where portfolio_id is not null
),

orphans as (
    select
        n.portfolio_id,
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'warning' as severity,
        'no_holdings' as code,
        'portfolio ' || n.portfolio_id
        || ' appears in other tables but has no holdings; it is not evaluated.' as message
    from named_elsewhere as n
    left join held as h
        on n.portfolio_id = h.portfolio_id
    where n.portfolio_id is not null and h.portfolio_id is null
)

select * from orphans
