-- The asset classes of each evaluated portfolio: every class it ever held (on a holdings
-- date inside the calendar) or has in any policy row set. effects has a row for each of
-- them in every period; a class missing on a holdings date has weight 0 that date.
with evaluated as (
    select * from int_portfolios_evaluated
),

holdings as (
    select * from int_holdings_placed_on_calendar
),

calendar as (
    select * from int_calendar_inferred
),

policy as (
    select * from stg_policy
),

calendar_size as (
    select max(n_periods) as n_periods
    from calendar
),

named_classes as (
    select
        h.portfolio_id,
        h.asset_class
    from holdings as h
    cross join calendar_size as c
    where h.period_index < c.n_periods
    union
    select
        portfolio_id,
        asset_class
    from policy
),

universe as (
    select
        n.portfolio_id,
        n.asset_class
    from named_classes as n
    inner join evaluated as e
        on n.portfolio_id = e.portfolio_id
)

select * from universe
