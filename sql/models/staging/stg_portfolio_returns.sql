-- portfolio_returns as given (optional; an empty relation when not given): the reported
-- total return of each portfolio and period. Rename and cast only.
with source as (
    select * from portfolio_returns
),

renamed as (
    select
        cast(portfolio_id as varchar) as portfolio_id,
        cast(period_end as date) as period_end,
        cast("return" as double) as reported_return
    from source
)

select * from renamed
