-- Holdings dates further apart than the portfolio's usual spacing: one `holdings_gap`
-- warning per gap, dated at the holdings date that ends it; the weights drift through it.
with holdings_dates as (
    select * from int_holdings_dates_spaced
),

windows as (
    select * from int_portfolio_windows_spanned
),

calendar as (
    select * from int_calendar_inferred
),

gaps as (
    select
        d.portfolio_id,
        c.period_start as period_end,
        cast(null as varchar) as asset_class,
        'warning' as severity,
        'holdings_gap' as code,
        'holdings: portfolio ' || d.portfolio_id || ': ' || cast(d.gap_periods as varchar)
        || ' periods between holdings dates up to ' || cast(c.period_start as varchar)
        || ' (usual spacing ' || cast(w.spacing as varchar)
        || '); the weights drifted buy-and-hold through the gap.' as message
    from holdings_dates as d
    inner join windows as w
        on d.portfolio_id = w.portfolio_id
    inner join calendar as c
        on d.period_index = c.period_index
    where d.gap_periods > w.spacing
)

select * from gaps
